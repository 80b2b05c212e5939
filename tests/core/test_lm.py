"""The batched Levenberg-Marquardt engine (core/seismic/lm.py) against scipy.optimize.least_squares."""

import numpy as np
import pytest
from rockhead.core.errors import CancelledError
from rockhead.core.seismic import forward, lm
from scipy.optimize import least_squares

SIGMA = 5e-4


class Hyperbola:
    """t = sqrt(t0^2 + x^2 / v^2) in (ln t0, ln v): the NMO hyperbola (Levin 1971), padded rows."""

    def __init__(self, x):
        self.x = x

    def take(self, rows):
        return Hyperbola(self.x[rows])

    def evaluate(self, theta, natural=False, jacobian=True):
        t0, v = np.exp(theta[:, 0, None]), np.exp(theta[:, 1, None])
        t = np.sqrt(t0**2 + self.x**2 / v**2)
        if not jacobian:
            return t, None
        return t, np.stack([t0**2 / t, -(self.x**2) / (v**2 * t)], axis=1)


def _problems(rng, k, outliers=True):
    x = np.tile(np.arange(4.0, 100.0, 4.0), (k, 1))
    t0 = rng.uniform(0.02, 0.06, k)
    v = rng.uniform(1500.0, 3500.0, k)
    t = forward.cmp_traveltime(x, t0[:, None], v[:, None]) + rng.normal(0.0, SIGMA, x.shape)
    if outliers:
        t[:, ::7] += 0.004  # 8-sigma mispicks
    theta0 = np.column_stack([np.log(t0 * 1.2), np.log(v * 0.8)])
    return Hyperbola(x), theta0, t


@pytest.mark.parametrize("loss", ["linear", "huber", "soft_l1", "cauchy"], ids=str)
def test_same_minimum_as_scipy(loss, rng):
    model, theta0, t = _problems(rng, 40)
    sigma = np.full(t.shape, SIGMA)
    sol = lm.batched_least_squares(model, theta0, t, sigma, np.ones(t.shape, bool), loss, 1.5)
    assert sol.converged.all()
    for k in range(len(t)):
        mk = model.take(slice(k, k + 1))
        ref = least_squares(
            lambda th, mk=mk, k=k: (t[k] - mk.evaluate(th[None, :], jacobian=False)[0][0]) / SIGMA,
            theta0[k],
            loss=loss,
            f_scale=1.5,
            xtol=1e-14,
            ftol=1e-14,
            gtol=1e-14,
        )
        # the engine stops at steps below 1e-6 in ln t0 and ln v and contracts fast from there:
        # 1e-7 in the log parameters is a relative 1e-7 in t0 and v
        np.testing.assert_allclose(sol.theta[k], ref.x, atol=1e-7)
    pred, jac = model.evaluate(sol.theta)
    np.testing.assert_array_equal(sol.time_s, pred)
    np.testing.assert_allclose(sol.jacobian, jac, rtol=1e-6)  # the last step may skip a Jacobian update


def test_blocks_and_threads_agree(rng, monkeypatch):
    model, theta0, t = _problems(rng, 200)
    args = (t, np.full(t.shape, SIGMA), np.ones(t.shape, bool), "huber", 1.5)
    one = lm.batched_least_squares(model, theta0, *args)
    monkeypatch.setattr(lm, "BLOCK_ELEMENTS", 24 * 23)  # 23 rows per block, uneven last block
    monkeypatch.setattr(lm, "worker_count", lambda: 2)
    assert len(lm.block_slices(200, 24)) == 9
    many = lm.batched_least_squares(model, theta0, *args)
    # rows are independent problems; only BLAS rounding of the batched products may differ
    np.testing.assert_allclose(many.theta, one.theta, rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(many.converged, one.converged)


def test_cancel_stops_the_engine(rng):
    class Cancelled:
        def is_canceled(self):
            return True

        def set_progress(self, value):
            pass

    model, theta0, t = _problems(rng, 3)
    with pytest.raises(CancelledError):
        lm.batched_least_squares(
            model, theta0, t, np.full(t.shape, SIGMA), np.ones(t.shape, bool), "huber", 1.5, progress=Cancelled()
        )


def test_no_rows():
    sol = lm.batched_least_squares(
        Hyperbola(np.zeros((0, 5))),
        np.zeros((0, 2)),
        np.zeros((0, 5)),
        np.ones((0, 5)),
        np.zeros((0, 5), bool),
        "huber",
        1.5,
    )
    assert sol.theta.shape == (0, 2) and sol.jacobian.shape == (0, 2, 5)
