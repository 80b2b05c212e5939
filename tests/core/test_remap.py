"""The quick remap after a pick edit gives the map the whole run gives from the same edits file."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
from rockhead.core import job
from rockhead.core.formats.gdalio import read_layer, read_raster
from rockhead.core.remap import Pinned, pinned_choices, remap

HEADER = "line,shot,receiver,reflector,action,new_time_ms,reason,time_stamp\n"


@pytest.fixture(scope="module")
def site(tmp_path_factory, sample_dir, sample_run):
    """A private copy of the sample survey, with the session's one whole run of it as ``before``."""
    d = tmp_path_factory.mktemp("remap")
    for name in ("survey.toml", "stations.csv", "picks.csv", "boreholes.csv"):
        shutil.copy(sample_dir / name, d / name)
    shutil.copytree(sample_run.out, d / "before")
    return d, sample_run.result


def test_pinned_choices_are_the_runs(site):
    _, first = site
    p = pinned_choices(first)
    assert p.method == first.method_used == "kriging"  # the sample's reflector is planar: kriging makes the map
    assert p.variogram_model == first.seismic_diagnostics.variogram.model


def test_the_joint_cross_check_fits_no_variogram_until_asked(site):
    # the sample's map is the kriging: nothing simulates the joint estimate, so its points'
    # variogram is not fitted; asked for, it is the one the surface module fits to them
    from rockhead.core.surface.trend import model_with_trend
    from rockhead.core.workflow import tomography_conditioning

    _, first = site
    t = first.tomography
    assert first.method_used == "kriging" and t.ran and t.variogram is None
    settings = first.survey.settings
    added = tomography_conditioning(t, settings)
    assert added.variogram == model_with_trend(*t.kriged_data, settings)["variogram"]
    assert tomography_conditioning(added, settings) is added


def test_remap_writes_the_map_the_whole_run_writes(site, tmp_path):
    d, first = site
    # an edit: exclude three picks of one gather, retime a fourth
    (d / "pick_edits.csv").write_text(
        HEADER + "B,1105,1070,,exclude,,test,\nB,1105,1071,,exclude,,,\nB,1105,1072,,exclude,,,\n"
        "B,1105,1080,,retime,43.9,,2026-12-02T08:00:00Z\n"
    )
    try:
        quick = tmp_path / "quick"
        shutil.copytree(d / "before", quick)
        outcome = remap(d / "survey.toml", pinned_choices(first), quick)
        names = {p.name for p in outcome.written}
        assert {"survey.gpkg", "reflector_depth.tif", "reflector_depth.qml", "contours_depth.dxf"} <= names
        assert "report.html" not in names  # the documents come with the whole run
        assert outcome.seconds > 0 and any("quick remap" in n for n in outcome.result.notes)
        whole = job.run(d / "survey.toml", tmp_path / "whole")  # what `rockhead run` does
    finally:
        (d / "pick_edits.csv").unlink()
    assert pinned_choices(whole) == pinned_choices(first)  # the edit did not tip the model choice
    for layer in ("shots", "reflector_points", "contours", "boreholes"):
        a, _ = read_layer(quick / "survey.gpkg", layer)
        b, _ = read_layer(tmp_path / "whole" / "survey.gpkg", layer)
        assert len(a) == len(b), layer
        for k, v in a.fields.items():
            if np.asarray(v).dtype.kind == "f":
                # same inputs, same choices, same code path: equal but for the order of threaded sums
                np.testing.assert_allclose(v, b.fields[k], rtol=1e-9, atol=1e-9, equal_nan=True, err_msg=k)
            else:
                assert list(v) == list(b.fields[k]), (layer, k)
    shots, _ = read_layer(quick / "survey.gpkg", "shots")
    i = np.flatnonzero((np.asarray(shots.fields["line"]) == "B") & (np.asarray(shots.fields["shot"]) == "1105"))
    assert int(shots.fields["picks_excluded"][i[0]]) == 3
    for name in ("reflector_depth.tif", "reflector_elevation.tif", "depth_sigma.tif"):
        np.testing.assert_array_equal(read_raster(quick / name).values, read_raster(tmp_path / "whole" / name).values)
    # and the map did change with the edit (the surface under line B moved)
    before = read_raster(d / "before" / "reflector_depth.tif").values
    assert np.nanmax(np.abs(read_raster(quick / "reflector_depth.tif").values - before)) > 1e-3


def test_remap_without_a_folder_only_computes(site):
    d, _ = site
    outcome = remap(d / "survey.toml", Pinned(variogram_model="exponential", method="kriging"))
    assert outcome.written == []
    assert outcome.result.seismic_diagnostics.variogram.model == "exponential"
