"""Stacked small-array tools (core/seismic/batch.py) against numpy's own routines."""

import numpy as np
import pytest
from rockhead.core.seismic import batch


def _spd(rng, k, p):
    a = rng.normal(size=(k, p, p))
    return a @ a.transpose(0, 2, 1) + 0.1 * np.eye(p)


@pytest.mark.parametrize("p", [1, 2, 3, 4], ids=["p1", "p2", "p3", "p4"])
def test_inverse_small_is_numpys(p, rng):
    A = _spd(rng, 50, p) * rng.uniform(0.1, 10.0, (50, 1, 1))
    inv, det = batch.inverse_small(A)
    # condition numbers up to ~1e3 here: 1e-10 relative is rounding
    np.testing.assert_allclose(inv, np.linalg.inv(A), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(det, np.linalg.det(A), rtol=1e-10)


@pytest.mark.parametrize("p", [2, 3, 4], ids=["p2", "p3", "p4"])
def test_safe_solve_is_numpys(p, rng):
    A = _spd(rng, 50, p)
    # very different scales per unknown: the Jacobi scaling must keep the answer exact
    scale = np.array([1e-3, 1e3, 1.0, 10.0][:p])
    A = A * scale[None, :, None] * scale[None, None, :]
    b = rng.normal(size=(50, p))
    np.testing.assert_allclose(batch.safe_solve(A, b), np.linalg.solve(A, b[:, :, None])[:, :, 0], rtol=1e-9)


def test_safe_solve_gives_zero_for_singular_and_indefinite():
    A = np.array([[[1.0, 1.0], [1.0, 1.0]], [[1.0, 2.0], [2.0, 1.0]], [[2.0, 0.0], [0.0, 2.0]]])
    x = batch.safe_solve(A, np.ones((3, 2)))
    np.testing.assert_array_equal(x[:2], 0.0)
    np.testing.assert_allclose(x[2], [0.5, 0.5])


def test_pad_unpad_round_trip(rng):
    gather = rng.integers(0, 7, 60)  # unsorted, uneven counts, gather 0..6
    values = rng.normal(size=60)
    row, col, nmax = batch.pad_layout(gather, 8)  # gather 7 has no pick
    assert nmax == np.bincount(gather).max()
    padded = batch.pad(values, row, col, (8, nmax), fill=np.nan)
    np.testing.assert_array_equal(batch.unpad(padded, row, col), values)
    assert np.all(np.isnan(padded[7]))
    for g in range(7):  # each row holds its gather's picks in input order
        np.testing.assert_array_equal(padded[g, : np.sum(gather == g)], values[gather == g])


def test_regular_layout_is_a_reshape():
    gather = np.repeat(np.arange(4), 5)
    row, col, nmax = batch.pad_layout(gather, 4)
    assert row is None and col is None and nmax == 5
    values = np.arange(20.0)
    np.testing.assert_array_equal(batch.pad(values, row, col, (4, 5)), values.reshape(4, 5))
    np.testing.assert_array_equal(batch.unpad(values.reshape(4, 5), row, col), values)


def test_row_statistics_are_numpys(rng):
    values = rng.normal(size=(30, 12))
    mask = rng.random((30, 12)) < 0.6
    mask[0] = False
    med = batch.row_median(values, mask)
    expected = [np.median(v[m]) if m.any() else np.nan for v, m in zip(values, mask)]
    np.testing.assert_array_equal(med, expected)
    key = rng.integers(0, 5, (30, 12)) * 0.5 + rng.uniform(-1e-4, 1e-4, (30, 12))
    count = batch.distinct_count(key, mask, 0.01)
    np.testing.assert_array_equal(count, [len(np.unique(np.round(k[m] / 0.01))) for k, m in zip(key, mask)])
    np.testing.assert_allclose(batch.row_sum(values), values.sum(axis=1), rtol=1e-13, atol=1e-14)  # summation order
