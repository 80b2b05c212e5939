r"""Array tools for many small problems solved at once (one row per gather).

Per-pick values of many gathers are held in a padded ``(g, nmax)`` layout: row
k holds the picks of gather k, and cells without a pick are filled with a
harmless value and masked. When every gather has the same number of picks and
the picks are grouped by gather (the usual case) the layout is a plain
reshape. This layout beat ``np.bincount`` segment sums by a factor of two in
benchmarks/bench_inversion.py.

Small dense systems (2 x 2 and 3 x 3, one per gather) are solved by closed-form
adjugates in one vectorised expression, which avoids one LAPACK call per
system.
"""

from __future__ import annotations

from typing import Optional, Union

import numpy as np

__all__ = [
    "distinct_count",
    "inverse_small",
    "pad",
    "pad_layout",
    "row_median",
    "row_sum",
    "safe_solve",
    "unpad",
]


def row_sum(a: np.ndarray) -> np.ndarray:
    """Sum of each row of a 2-D array.

    A matrix-vector product with a vector of ones, faster than
    ``a.sum(axis=1)`` for the short rows of a padded layout.

    Parameters
    ----------
    a : (k, n) ndarray
        Values (any unit).

    Returns
    -------
    (k,) ndarray
        Row sums, in the unit of ``a``.

    Examples
    --------
    >>> row_sum(np.array([[1.0, 2.0], [3.0, 4.0]])).tolist()
    [3.0, 7.0]
    """
    return a @ np.ones(a.shape[1])


def pad_layout(gather: np.ndarray, n_gathers: int) -> tuple[Optional[np.ndarray], Optional[np.ndarray], int]:
    """Row and column of each pick in a padded ``(g, nmax)`` layout.

    Parameters
    ----------
    gather : (n,) int ndarray
        Gather index (0 .. ``n_gathers`` - 1) of each pick.
    n_gathers : int
        Number of gathers g (rows of the layout).

    Returns
    -------
    row, col : (n,) int ndarray or None
        Cell of each pick; both None when the picks are grouped by gather in
        increasing order and every gather has the same number of picks, so that
        padding is a plain reshape.
    nmax : int
        Number of columns: the largest number of picks of a gather (at least 1).

    Examples
    --------
    >>> row, col, nmax = pad_layout(np.array([1, 0, 1]), 2)
    >>> row.tolist(), col.tolist(), nmax
    ([1, 0, 1], [0, 0, 1], 2)
    >>> pad_layout(np.array([0, 0, 1, 1]), 2)
    (None, None, 2)
    """
    gather = np.asarray(gather, dtype=np.intp)
    n = len(gather)
    counts = np.bincount(gather, minlength=n_gathers)
    nmax = max(int(counts.max()) if len(counts) and n else 1, 1)
    if n and n == n_gathers * nmax and np.all(gather[1:] >= gather[:-1]):
        return None, None, nmax
    order = np.argsort(gather, kind="stable")
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    col = np.empty(n, dtype=np.intp)
    col[order] = np.arange(n) - starts[gather[order]]
    return gather, col, nmax


def pad(
    values: Union[np.ndarray, float, bool],
    row: Optional[np.ndarray],
    col: Optional[np.ndarray],
    shape: tuple[int, int],
    fill: Union[float, bool] = 0.0,
    dtype: type = float,
    fresh: bool = False,
) -> np.ndarray:
    """Flat per-pick values to the padded ``(g, nmax)`` layout.

    Parameters
    ----------
    values : (n,) ndarray or scalar
        Per-pick values (any unit), or one value for every pick.
    row, col : (n,) int ndarray or None
        The layout from :func:`pad_layout`.
    shape : tuple of int
        ``(g, nmax)``.
    fill : float or bool
        Value of the cells without a pick.
    dtype : type
        Type of the result.
    fresh : bool
        ``values`` is a temporary of the right type that may be reshaped in
        place of a copy (regular layout only).

    Returns
    -------
    (g, nmax) ndarray
        The padded values.

    Examples
    --------
    >>> pad(np.array([5.0, 6.0, 7.0]), np.array([1, 0, 1]), np.array([0, 0, 1]), (2, 2), fill=-1.0).tolist()
    [[6.0, -1.0], [5.0, 7.0]]
    """
    if row is None:
        if fresh:
            return np.reshape(values, shape)
        out: np.ndarray = np.empty(shape, dtype=dtype)
        out[...] = np.reshape(values, shape) if np.ndim(values) else values
        return out
    out = np.full(shape, fill, dtype=dtype)
    out[row, col] = values
    return out


def unpad(padded: np.ndarray, row: Optional[np.ndarray], col: Optional[np.ndarray]) -> np.ndarray:
    """Return padded ``(g, nmax)`` values to flat per-pick order (the inverse of :func:`pad`).

    Parameters
    ----------
    padded : (g, nmax) ndarray
        Padded values (any unit).
    row, col : (n,) int ndarray or None
        The layout from :func:`pad_layout`.

    Returns
    -------
    (n,) ndarray
        One value per pick, in the order of the flat input (a new array).
    """
    if row is None:
        return padded.reshape(-1).copy()
    return padded[row, col]


def inverse_small(A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverses and determinants of stacked small square matrices.

    Closed-form adjugate for p <= 3 (one vectorised expression instead of a
    LAPACK call per matrix); ``numpy.linalg`` otherwise.

    Parameters
    ----------
    A : (k, p, p) ndarray
        The matrices.

    Returns
    -------
    inverse : (k, p, p) ndarray
        Their inverses; a singular matrix gives non-finite entries.
    determinant : (k,) ndarray
        Their determinants (0 for a singular matrix).

    Examples
    --------
    >>> inv, det = inverse_small(np.array([[[2.0, 1.0], [1.0, 1.0]]]))
    >>> inv[0].tolist(), det.tolist()
    ([[1.0, -1.0], [-1.0, 2.0]], [1.0])
    """
    p = A.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if p == 1:
            det = A[:, 0, 0].copy()
            return (1.0 / det)[:, None, None], det
        if p == 2:
            a, b, c, d = A[:, 0, 0], A[:, 0, 1], A[:, 1, 0], A[:, 1, 1]
            det = a * d - b * c
            adj = np.stack([np.stack([d, -b], -1), np.stack([-c, a], -1)], -2)
            return adj / det[:, None, None], det
        if p == 3:
            a = A
            c00 = a[:, 1, 1] * a[:, 2, 2] - a[:, 1, 2] * a[:, 2, 1]
            c01 = a[:, 1, 2] * a[:, 2, 0] - a[:, 1, 0] * a[:, 2, 2]
            c02 = a[:, 1, 0] * a[:, 2, 1] - a[:, 1, 1] * a[:, 2, 0]
            c10 = a[:, 0, 2] * a[:, 2, 1] - a[:, 0, 1] * a[:, 2, 2]
            c11 = a[:, 0, 0] * a[:, 2, 2] - a[:, 0, 2] * a[:, 2, 0]
            c12 = a[:, 0, 1] * a[:, 2, 0] - a[:, 0, 0] * a[:, 2, 1]
            c20 = a[:, 0, 1] * a[:, 1, 2] - a[:, 0, 2] * a[:, 1, 1]
            c21 = a[:, 0, 2] * a[:, 1, 0] - a[:, 0, 0] * a[:, 1, 2]
            c22 = a[:, 0, 0] * a[:, 1, 1] - a[:, 0, 1] * a[:, 1, 0]
            det = a[:, 0, 0] * c00 + a[:, 0, 1] * c01 + a[:, 0, 2] * c02
            adj = np.stack(
                [np.stack([c00, c10, c20], -1), np.stack([c01, c11, c21], -1), np.stack([c02, c12, c22], -1)],
                -2,
            )
            return adj / det[:, None, None], det
        det = np.linalg.det(A)
        inv = np.full(A.shape, np.nan)
        ok = np.isfinite(det) & (det != 0)
        if np.any(ok):
            inv[ok] = np.linalg.pinv(A[ok])
        return inv, np.where(ok, det, 0.0)


def safe_solve(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve stacked symmetric systems ``A x = b`` after Jacobi scaling.

    p = 2 and 3 by the closed-form adjugate of a symmetric matrix (no LAPACK
    call per system); other sizes through :func:`inverse_small`.

    Parameters
    ----------
    A : (k, p, p) ndarray
        Symmetric matrices.
    b : (k, p) ndarray
        Right-hand sides.

    Returns
    -------
    (k, p) ndarray
        Solutions; 0 for a system that is singular or not positive definite
        (non-positive determinant after scaling) or gives a non-finite result.

    Examples
    --------
    >>> safe_solve(np.array([[[4.0, 0.0], [0.0, 1.0]]]), np.array([[2.0, 3.0]])).tolist()
    [[0.5, 3.0]]
    """
    d = np.sqrt(np.abs(A.diagonal(axis1=1, axis2=2)))
    d = np.where(d > 0, d, 1.0)
    a = A / (d[:, :, None] * d[:, None, :])
    bs = b / d
    p = A.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if p == 3:
            a00, a01, a02, a11, a12, a22 = a[:, 0, 0], a[:, 0, 1], a[:, 0, 2], a[:, 1, 1], a[:, 1, 2], a[:, 2, 2]
            c00 = a11 * a22 - a12 * a12
            c01 = a02 * a12 - a01 * a22
            c02 = a01 * a12 - a02 * a11
            c11 = a00 * a22 - a02 * a02
            c12 = a01 * a02 - a00 * a12
            c22 = a00 * a11 - a01 * a01
            det = a00 * c00 + a01 * c01 + a02 * c02
            b0, b1, b2 = bs[:, 0], bs[:, 1], bs[:, 2]
            x = np.empty_like(bs)
            inv_det = 1.0 / det
            x[:, 0] = (c00 * b0 + c01 * b1 + c02 * b2) * inv_det
            x[:, 1] = (c01 * b0 + c11 * b1 + c12 * b2) * inv_det
            x[:, 2] = (c02 * b0 + c12 * b1 + c22 * b2) * inv_det
        elif p == 2:
            a00, a01, a11 = a[:, 0, 0], a[:, 0, 1], a[:, 1, 1]
            det = a00 * a11 - a01 * a01
            x = np.column_stack([a11 * bs[:, 0] - a01 * bs[:, 1], a00 * bs[:, 1] - a01 * bs[:, 0]]) / det[:, None]
        else:
            inv, det = inverse_small(a)
            x = np.matmul(inv, bs[:, :, None])[:, :, 0]
    good = (det > 0) & np.all(np.isfinite(x), axis=1)
    x[~good] = 0.0
    return x / d


def row_median(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Median of each row over the cells where ``mask`` is true.

    Parameters
    ----------
    values : (k, n) ndarray
        Values (any unit).
    mask : (k, n) bool ndarray
        Cells taking part.

    Returns
    -------
    (k,) ndarray
        Row medians, in the unit of ``values``; NaN for a row without cells.

    Examples
    --------
    >>> v = np.array([[3.0, 1.0, 2.0, 9.0], [1.0, 2.0, 3.0, 4.0]])
    >>> row_median(v, np.array([[True, True, True, False], [False] * 4])).tolist()
    [2.0, nan]
    """
    v = np.where(mask, values, np.inf)
    v = np.sort(v, axis=1)
    c = mask.sum(axis=1)
    lo = np.clip((c - 1) // 2, 0, v.shape[1] - 1)
    hi = np.clip(c // 2, 0, v.shape[1] - 1)
    med = 0.5 * (np.take_along_axis(v, lo[:, None], 1)[:, 0] + np.take_along_axis(v, hi[:, None], 1)[:, 0])
    return np.where(c > 0, med, np.nan)


def distinct_count(key: np.ndarray, mask: np.ndarray, resolution: float) -> np.ndarray:
    """Count the distinct values of each row, after rounding to ``resolution``.

    Parameters
    ----------
    key : (k, n) ndarray
        Values, e.g. offsets in metres.
    mask : (k, n) bool ndarray
        Cells taking part.
    resolution : float
        Values closer than about this (unit of ``key``) count as one.

    Returns
    -------
    (k,) int ndarray
        Distinct values in each row.

    Examples
    --------
    >>> distinct_count(np.array([[1.0, 1.001, 2.0, 3.0]]), np.array([[True, True, True, False]]), 0.01).tolist()
    [2]
    """
    k = np.where(mask, np.round(key / resolution), np.inf)
    k = np.sort(k, axis=1)
    new = np.isfinite(k[:, 1:]) & (k[:, 1:] != k[:, :-1])
    return np.isfinite(k[:, 0]).astype(int) + new.sum(axis=1)
