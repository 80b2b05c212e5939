"""The whole computation over a buried valley: the automatic method choice.

The truth is the buried valley of test_tomography (radius of curvature 50 m at
36 m depth, Fermat traveltimes, 0.3 ms noise, 3 % mispicks; Bishop et al. 1985
describe why plane fits fail there). Written as survey files and run through
the pipeline with surface_method = "auto", gathers over the axis must depart
from the site velocity, the map must come from the joint inversion, and it
must beat the kriged gather fits against the truth.
"""

import numpy as np
import pytest
from rockhead.core.survey.config import load_survey
from rockhead.core.tomography import joint as tm
from rockhead.core.workflow import compute
from test_tomography import GRID, SIGMA_S, V_TRUE, ground, true_nodes, valley_lines

pytestmark = pytest.mark.slow  # slow tier: a whole computation with the joint inversion (end to end)

E0, N0 = 500_000.0, 5_000_000.0  # local site coordinates placed in UTM zone 33N


@pytest.fixture(scope="module")
def valley_run(tmp_path_factory):
    rng = np.random.default_rng(7)
    folder = tmp_path_factory.mktemp("valley")
    lines = valley_lines()  # the lines of test_tomography's valley survey
    st_rows, pk_rows = [], []
    for name, xy in lines.items():
        z = ground(xy[:, 0], xy[:, 1])
        labels = [str(1000 + i) for i in range(len(xy))]
        st_rows += [f"{name},{lab},{x + E0:.3f},{y + N0:.3f},{zz:.3f}" for lab, (x, y), zz in zip(labels, xy, z)]
        xyz = np.column_stack([xy, z])
        for i in range(24, len(xy) - 24, 4):
            idx = np.r_[i - 24 : i, i + 1 : i + 25]
            paths = tm.fermat_traveltime(np.repeat(xyz[i][None], 48, 0), xyz[idx], true_nodes(), GRID, V_TRUE)
            t = paths.time_s + rng.normal(0.0, SIGMA_S, 48)
            bad = rng.random(48) < 0.03
            t[bad] += rng.choice([-1.0, 1.0], bad.sum()) * rng.uniform(3e-3, 8e-3, bad.sum())
            pk_rows += [f"{name},{labels[i]},{labels[j]},{tt * 1e3:.4f},0.3" for j, tt in zip(idx, t)]
    (folder / "stations.csv").write_text("line,station,x,y,z\n" + "\n".join(st_rows) + "\n")
    (folder / "picks.csv").write_text("line,shot,receiver,time_ms,sigma_ms\n" + "\n".join(pk_rows) + "\n")
    (folder / "survey.toml").write_text(
        '[survey]\nname = "valley"\ncrs = "EPSG:32633"\n[files]\nstations = "stations.csv"\npicks = "picks.csv"\n'
    )
    return compute(load_survey(folder / "survey.toml"))


def _rms_against_truth(surface):
    X, Y = np.meshgrid(surface.spec.x_centres - E0, surface.spec.y_centres - N0)
    truth = tm.surface_values(true_nodes(), X, Y, GRID)
    err = surface.z - truth
    ok = np.isfinite(err)
    return float(np.sqrt(np.mean(err[ok] ** 2)))


def test_auto_chooses_the_joint_inversion_over_the_valley(valley_run):
    r = valley_run
    assert r.method_used == "tomography"
    assert r.tomography.ran and r.tomography.skipped_reason is None
    assert np.sum(r.tomography.curvature_flag) >= 3  # the gathers over the axis
    res = r.tomography.inversion
    # velocity: 0.5 % (issue requirement; Bishop et al. 1985 recover V jointly with the surface)
    assert res.velocity_m_s == pytest.approx(V_TRUE, rel=0.005)


def test_joint_inversion_beats_the_gather_fits_over_the_valley(valley_run):
    r = valley_run
    tomo, kriged = _rms_against_truth(r.surface), _rms_against_truth(r.kriged_surface)
    print(f"valley: joint inversion {tomo:.2f} m rms, kriged gather fits {kriged:.2f} m rms")
    # the gather fits over the axis are 15-18 m too deep (focusing); the joint route is not.
    # Measured when written: 0.50 m against 3.60 m rms over the mapped cells.
    assert tomo < 0.5 * kriged, (tomo, kriged)
    assert tomo < 1.5, tomo
