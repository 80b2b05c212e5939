"""The result types of a run: frozen, typed, and consistent by construction."""

import dataclasses

import numpy as np
import pytest
from rockhead.core import results
from rockhead.core.grid import GridSpec
from rockhead.core.products import layers
from rockhead.core.survey.model import Settings

RESULT_TYPES = [getattr(results, name) for name in results.__all__]


@pytest.mark.parametrize("cls", RESULT_TYPES, ids=[c.__name__ for c in RESULT_TYPES])
def test_every_result_type_is_a_frozen_dataclass_with_real_types(cls):
    assert dataclasses.is_dataclass(cls)
    assert cls.__dataclass_params__.frozen
    for f in dataclasses.fields(cls):
        # no catch-all annotations: each field names what it holds
        assert f.type not in ("object", "dict", "list", "Any"), (cls.__name__, f.name, f.type)


def test_a_frozen_result_refuses_assignment():
    check = results.BoreholeCheck(np.zeros(2), np.ones(2), np.zeros(2), np.zeros(2))
    with pytest.raises(dataclasses.FrozenInstanceError):
        check.residual_m = np.ones(2)


def test_skipped_joint_inversion_carries_only_its_reason():
    out = results.TomographyOutcome.skipped("only 12 picks of the mapped reflector (at least 200 needed)")
    assert not out.ran and out.skipped_reason.startswith("only 12 picks")
    assert out.surface is None and out.inversion is None and out.curvature_flag is None
    with pytest.raises(ValueError, match="carries only its reason"):
        results.TomographyOutcome(skipped_reason="x", used=np.zeros(3, bool))
    with pytest.raises(ValueError, match="must carry all its parts"):
        results.TomographyOutcome(used=np.zeros(3, bool))


def test_surface_diagnostics_type_the_surface_modules_output(rng):
    """Kriging of a dipping plane plus noise: the typed diagnostics hold what the surface module found."""
    from rockhead.core.surface.base import CrossValidation
    from rockhead.core.surface.trend import PlaneTrend, grid_with_trend
    from rockhead.core.surface.variogram import VariogramModel

    x, y = rng.uniform(0, 200, 150), rng.uniform(0, 200, 150)
    z = 50.0 + 0.05 * x - 0.02 * y + np.sin(x / 30.0) + rng.normal(0, 0.1, x.size)
    spec = GridSpec.from_data(x, y, cell_size_m=10.0)
    surf, raw = grid_with_trend(x, y, z, np.full(x.size, 0.1), spec, Settings())
    d = results.SurfaceDiagnostics.from_surface(raw)
    assert d.method == "kriging" and d.n_data == 150
    assert d.n_cells == spec.size and d.n_cells_estimated == int((~surf.mask).sum())
    assert isinstance(d.trend, PlaneTrend) and isinstance(d.variogram, VariogramModel)
    assert isinstance(d.cross_validation, CrossValidation)
    # the fitted regional plane recovers the planted dip (least squares; the sine averages out
    # over 200 m to within a few thousandths of a metre per metre)
    assert d.trend.coef[1] == pytest.approx(0.05, abs=0.01) and d.trend.coef[2] == pytest.approx(-0.02, abs=0.01)
    # "auto" scores the three models (sorted by name) and keeps the lowest score
    assert [m for m, _ in d.variogram_scores] == ["exponential", "gaussian", "spherical"]
    assert d.variogram.model == min(d.variogram_scores, key=lambda p: p[1])[0]
    assert dict(d.variogram_fitted).keys() == {"exponential", "gaussian", "spherical"}
    assert d.smoothing is None


def _table(cls, n=2):
    values = {}
    for f in dataclasses.fields(cls):
        values[f.name] = np.arange(n, dtype=float)
    return cls(**values)


# the layers' field names are fixed (README, Outputs): these lists are the contract
DIX_FIELDS = [
    "line",
    "shot",
    "reflector_top",
    "reflector_base",
    "t0_top_ms",
    "t0_base_ms",
    "interval_velocity_m_s",
    "se_interval_velocity_m_s",
    "thickness_m",
    "se_thickness_m",
    "depth_base_m",
    "status",
    "reason",
]
CMP_FIELDS = [
    "line",
    "reflector",
    "t0_ms",
    "nmo_velocity_m_s",
    "se_t0_ms",
    "se_nmo_velocity_m_s",
    "depth_m",
    "rms_residual_ms",
    "picks_used",
    "picks_rejected",
    "status",
    "reason",
    "bin_m",
]


@pytest.mark.parametrize(
    ("cls", "make_layer", "expected"),
    [(results.DixTable, layers.dix_layer, DIX_FIELDS), (results.CmpTable, layers.cmp_layer, CMP_FIELDS)],
    ids=["dix_intervals", "cmp_fits"],
)
def test_point_tables_become_layers_with_the_fixed_fields(cls, make_layer, expected):
    table = _table(cls, n=3)
    assert len(table) == 3
    layer = make_layer(table)
    assert list(layer.fields) == expected
    assert [(g.x, g.y) for g in layer.geometries] == [(0.0, 0.0), (1.0, 1.0), (2.0, 2.0)]
