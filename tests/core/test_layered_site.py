"""The whole computation on the independent layered site (tests/data/layered_site).

The site was forward-modelled by fast marching (scikit-fmm, an eikonal solver
outside this project: tests/generators/make_layered_site.py, checked there
against Snell's law and the image source to 0.03 ms): dry sand with a
velocity gradient over a water table 4-6 m deep, saturated sediment whose
velocity changes 5 % across the site, and bedrock 25-39 m deep dipping 6 deg
with a knoll. Both reflections are picked. The map of the bedrock is
compared with the generator's own truth grid, cell by cell.

Targets (the layered-overburden issue): elevation RMS <= 0.5 m over the mapped
cells, mean error within +-0.2 m, and an honest sigma. Reflection traveltime
tomography after Bishop et al. (1985); posterior mean and standard deviation
after Tarantola (2005).
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from rockhead.core.survey.config import load_survey
from rockhead.core.workflow import compute
from scipy.interpolate import RegularGridInterpolator

pytestmark = pytest.mark.slow

SITE = Path(__file__).resolve().parents[1] / "data" / "layered_site"


def _truth_rock():
    grid = json.loads((SITE / "truth.json").read_text(encoding="utf-8"))["truth_grid"]
    arrays = np.load(SITE / "truth_grids.npz")
    xs = grid["x_west_m"] + (np.arange(grid["ncols"]) + 0.5) * grid["cell_m"]
    ys = grid["y_north_m"] - (np.arange(grid["nrows"]) + 0.5) * grid["cell_m"]
    rock_m = arrays["rock_mm"] / 1000.0
    return RegularGridInterpolator((ys[::-1], xs), rock_m[::-1], bounds_error=False)


def _errors(result):
    surface = result.surface
    x, y = surface.spec.coords()
    truth = _truth_rock()(np.column_stack([y.ravel(), x.ravel()])).reshape(x.shape)
    ok = ~surface.mask & np.isfinite(surface.z) & np.isfinite(truth)
    return surface.z[ok] - truth[ok], surface.std[ok], ok


@pytest.fixture(scope="module")
def runs():
    survey = load_survey(SITE / "survey.toml")
    without = replace(survey, boreholes=None)
    return {"seismic only": compute(without), "with boreholes": compute(survey)}


@pytest.mark.parametrize("case", ["seismic only", "with boreholes"])
def test_bedrock_map_matches_the_eikonal_truth(runs, case):
    err, sigma, _ = _errors(runs[case])
    rms = float(np.sqrt(np.mean(err**2)))
    mean = float(np.mean(err))
    # the targets: today's single-velocity map was 4.0 m RMS and 3.2 m too deep
    assert rms <= 0.5, (case, rms)
    assert abs(mean) <= 0.2, (case, mean)
    # honest sigma: a Gaussian posterior puts 95 % of the errors within 2 sigma; fewer than 90 %
    # would be overconfident (the failure this issue was filed for)
    inside = float(np.mean(np.abs(err) <= 2 * sigma))
    assert inside >= 0.90, (case, inside)


def test_boreholes_do_not_make_the_map_worse(runs):
    seismic, tied = (_errors(runs[k])[0] for k in ("seismic only", "with boreholes"))
    # 0.05 m: the noise of the comparison itself (cells are read from a 2 m truth grid, mm rounding)
    assert np.sqrt(np.mean(tied**2)) <= np.sqrt(np.mean(seismic**2)) + 0.05


def test_mapped_cells_cover_the_lines(runs):
    """Masking must not shrink the map to buy accuracy: every cell inside the lines' hull is mapped."""
    from scipy.spatial import Delaunay

    result = runs["seismic only"]
    st = result.survey.stations
    hull = Delaunay(np.column_stack([st.x_m, st.y_m]))
    x, y = result.surface.spec.coords()
    inside = hull.find_simplex(np.column_stack([x.ravel(), y.ravel()])).reshape(x.shape) >= 0
    mapped = ~result.surface.mask
    assert np.mean(mapped[inside]) >= 0.99, np.mean(mapped[inside])
