"""The joint normal matrix's factor (core.tomography.factor): log-determinant and solves against numpy's dense ones."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from rockhead.core.grid import GridSpec
from rockhead.core.tomography import factor
from rockhead.core.tomography.factor import NormalFactor, node_band_order


class _Layout:
    """What NormalFactor.of needs of a layout: the node count and the band ordering."""

    def __init__(self, spec, n_interfaces):
        self.spec = spec
        self.n_interfaces = n_interfaces
        self.n_nodes = n_interfaces * spec.nx * spec.ny

    def band_order(self):
        return node_band_order(self.spec, self.n_interfaces)


def _normal_matrix(spec, K, n_small, seed):
    """A normal matrix shaped like the joint estimate's: picks coupling nearby nodes of both interfaces,
    a few dense trend and velocity columns, a lattice prior on the nodes (SPD)."""
    rng = np.random.default_rng(seed)
    ny, nx = spec.shape
    nn = nx * ny
    n = K * nn + n_small
    rows, cols, vals = [], [], []
    for i in range(400):  # a "pick": a 2 x 2 node patch on each interface near one point, and the small columns
        r, c = rng.integers(0, ny - 1), rng.integers(0, nx - 1)
        patch = np.array([r * nx + c, r * nx + c + 1, (r + 1) * nx + c, (r + 1) * nx + c + 1])
        idx = np.concatenate([k * nn + patch for k in range(K)] + [K * nn + np.arange(n_small)])
        rows.append(np.full(idx.size, i))
        cols.append(idx)
        vals.append(rng.normal(size=idx.size))
    J = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(400, n))
    lap = sp.diags([-np.ones(nn - 1), 4.0 * np.ones(nn), -np.ones(nn - 1)], [-1, 0, 1])
    P = sp.block_diag([lap] * K + [sp.identity(n_small)])
    return (J.T @ J + P).tocsr()


@pytest.mark.parametrize(
    ("K", "n_small"),
    [(1, 0), (2, 7), (3, 4)],
    ids=["one interface, nodes only", "two interfaces with trends and velocities", "three interfaces"],
)
def test_log_determinant_and_solve_match_numpy(K, n_small):
    """Block elimination (Golub & Van Loan 2013, s. 3.2.11): the same log det A and A^-1 b as numpy's dense LU."""
    spec = GridSpec(0.0, 0.0, 5.0, 9, 6)
    A = _normal_matrix(spec, K, n_small, seed=K)
    dense = A.toarray()
    sign, want = np.linalg.slogdet(dense)
    assert sign > 0
    rng = np.random.default_rng(7)
    b = rng.normal(size=A.shape[0])
    B = rng.normal(size=(A.shape[0], 3))
    f = NormalFactor.of(A, _Layout(spec, K))
    assert f.cb is not None  # banded
    # a few hundred unknowns, condition number ~1e4: agreement to ~1e-12 relative
    assert f.log_det == pytest.approx(want, rel=1e-12)
    assert np.allclose(f.solve(b), np.linalg.solve(dense, b), rtol=1e-10, atol=1e-12)
    assert np.allclose(f.solve(B), np.linalg.solve(dense, B), rtol=1e-10, atol=1e-12)
    m = K * spec.nx * spec.ny
    want_U = np.linalg.solve(dense[:m, :m], dense[:m, m:])
    assert np.allclose(f.others_solved(), want_U, rtol=1e-10, atol=1e-12)
    g = NormalFactor.of(A, _Layout(spec, K))
    # g^T A^-1 g with g solved together with the other columns
    n = K * spec.nx * spec.ny
    A_us = A[:n, n:].toarray()
    A_ss = A[n:, n:].toarray()
    order = node_band_order(spec, K)
    inverse = np.empty(n, np.int64)
    inverse[order] = np.arange(n)
    C = A[:n, :n].tocoo()
    keep, d, c = factor.band_positions(C.row, C.col, inverse)
    ab = np.zeros((int(d.max()) + 1, n), order="F")
    ab[d, c] = C.data[keep]
    h = NormalFactor(("band", ab, order), A_us, A_ss, g=b)
    assert h.quadratic_ == pytest.approx(float(b @ np.linalg.solve(dense, b)), rel=1e-11)
    assert h.log_det == pytest.approx(g.log_det, rel=1e-13)


@pytest.mark.parametrize("band", [True, False], ids=["banded", "sparse LU"])
def test_damping_adds_a_multiple_of_the_diagonal(monkeypatch, band):
    """Levenberg-Marquardt (Marquardt 1963): the factor of A + mu diag(A), the same as numpy's of that matrix."""
    spec = GridSpec(0.0, 0.0, 5.0, 7, 5)
    A = _normal_matrix(spec, 2, 6, seed=11)
    mu = 0.37
    dense = A.toarray() + mu * np.diag(A.diagonal())
    if not band:
        monkeypatch.setattr(factor, "BAND_FLOPS", 0.0)
    b = np.random.default_rng(2).normal(size=A.shape[0])
    f = NormalFactor.of(A, _Layout(spec, 2), damping=mu)
    assert (f.cb is not None) == band
    assert f.log_det == pytest.approx(np.linalg.slogdet(dense)[1], rel=1e-12)
    assert np.allclose(f.solve(b), np.linalg.solve(dense, b), rtol=1e-10, atol=1e-12)


def test_wide_band_falls_back_to_the_sparse_lu(monkeypatch):
    """Beyond the band budget the node block goes to SuperLU: the same numbers."""
    spec = GridSpec(0.0, 0.0, 5.0, 8, 7)
    A = _normal_matrix(spec, 2, 5, seed=3)
    dense = A.toarray()
    b = np.random.default_rng(1).normal(size=A.shape[0])
    monkeypatch.setattr(factor, "BAND_FLOPS", 0.0)
    f = NormalFactor.of(A, _Layout(spec, 2))
    assert f.cb is None and f.lu is not None
    assert f.log_det == pytest.approx(np.linalg.slogdet(dense)[1], rel=1e-12)
    assert np.allclose(f.solve(b), np.linalg.solve(dense, b), rtol=1e-10, atol=1e-12)
    n = 2 * spec.nx * spec.ny
    assert np.allclose(f.others_solved(), np.linalg.solve(dense[:n, :n], dense[:n, n:]), rtol=1e-10, atol=1e-12)


def test_not_positive_definite_is_reported():
    """An indefinite matrix raises numpy's LinAlgError (the callers turn it into their own message)."""
    spec = GridSpec(0.0, 0.0, 5.0, 4, 3)
    A = _normal_matrix(spec, 1, 2, seed=5).tolil()
    A[3, 3] = -50.0
    with pytest.raises(np.linalg.LinAlgError):
        NormalFactor.of(A.tocsr(), _Layout(spec, 1))


@pytest.mark.parametrize(
    ("K", "n_small", "shape"),
    [(1, 0, (9, 6)), (2, 7, (9, 6)), (1, 5, (31, 20))],
    ids=["nodes only", "two interfaces with trends and velocities", "more unknowns than a block of rows"],
)
def test_dense_inverse_matches_numpy(K, n_small, shape):
    """A^-1 from the whole Cholesky factor by LAPACK potri (Golub & Van Loan 2013, s. 4.2): numpy's dense inverse."""
    spec = GridSpec(0.0, 0.0, 5.0, shape[1], shape[0])
    A = _normal_matrix(spec, K, n_small, seed=4)
    f = NormalFactor.of(A, _Layout(spec, K))
    assert f.banded
    inverse, position = f.dense_inverse()
    want = np.linalg.inv(A.toarray())
    got = inverse[np.ix_(position, position)]
    # up to 625 unknowns, condition number ~1e4: two factorisations agree to ~1e-12 of the largest entry
    assert np.allclose(got, want, rtol=0.0, atol=1e-10 * np.abs(want).max())
    assert np.array_equal(got, got.T)  # symmetric exactly: the upper triangle is copied from the lower


def test_dense_inverse_needs_the_band(monkeypatch):
    """The sparse LU kind has no whole triangular factor to invert: numpy's LinAlgError, for the caller to choose."""
    spec = GridSpec(0.0, 0.0, 5.0, 5, 4)
    monkeypatch.setattr(factor, "BAND_FLOPS", 0.0)
    f = NormalFactor.of(_normal_matrix(spec, 1, 2, seed=6), _Layout(spec, 1))
    assert not f.banded
    with pytest.raises(np.linalg.LinAlgError):
        f.dense_inverse()
