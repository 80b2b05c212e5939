"""The ray paths' Newton step (core.tomography.raypath): block-tridiagonal solve and definiteness against numpy."""

from __future__ import annotations

import numpy as np
import pytest
from rockhead.core.tomography.raypath import _block_tridiagonal


def _dense(Hd, Ho):
    n, m = Hd.shape[:2]
    H = np.zeros((n, 2 * m, 2 * m))
    for p in range(m):
        H[:, 2 * p : 2 * p + 2, 2 * p : 2 * p + 2] = Hd[:, p]
    for p in range(m - 1):
        H[:, 2 * p : 2 * p + 2, 2 * p + 2 : 2 * p + 4] = Ho[:, p]
        H[:, 2 * p + 2 : 2 * p + 4, 2 * p : 2 * p + 2] = np.swapaxes(Ho[:, p], -1, -2)
    return H


@pytest.mark.parametrize("m", [2, 3, 5], ids=["2 points", "3 points (two layers)", "5 points (three layers)"])
def test_block_tridiagonal_solve_and_definiteness_match_numpy(m):
    """Pivot blocks (Golub & Van Loan 2013, s. 4.5.1): numpy's dense solve, and definiteness from its eigenvalues."""
    rng = np.random.default_rng(m)
    n = 4000
    Hd = rng.normal(size=(n, m, 2, 2))
    Hd = Hd @ np.swapaxes(Hd, -1, -2) + 0.3 * np.eye(2)
    Ho = 0.8 / m * rng.normal(size=(n, m - 1, 2, 2))  # some of the matrices indefinite
    g = rng.normal(size=(n, m, 2))
    shift = rng.uniform(0.0, 0.2, n)
    pd, x = _block_tridiagonal(Hd, Ho, g, shift)
    H = _dense(Hd, Ho)
    lam = np.linalg.eigvalsh(H)[:, 0]
    want = lam > shift
    # the decision can differ only where the smallest eigenvalue is within rounding of the shift
    near = np.abs(lam - shift) < 1e-9
    assert np.all((pd == want) | near)
    assert 0.05 < want.mean() < 0.95  # both kinds are exercised
    ref = np.linalg.solve(H[pd], g[pd].reshape(-1, 2 * m)[..., None])[..., 0]
    # conditioning of these matrices (eigenvalues above the shift, norms ~10): agreement to ~1e-9
    assert np.allclose(x[pd].reshape(-1, 2 * m), ref, rtol=1e-8, atol=1e-9)
