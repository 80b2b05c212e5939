"""Cholesky factor of the joint normal matrix: a banded node block and a dense block of the few others.

The normal matrix of the joint estimate (:mod:`.system`) is symmetric
positive definite with the interface nodes first and the trend and velocity
parameters (a dozen) last:

.. math::

    A = \\begin{bmatrix} A_{uu} & A_{us} \\\\ A_{su} & A_{ss} \\end{bmatrix},\\qquad
    S = A_{ss} - A_{us}^T A_{uu}^{-1} A_{us}.

:math:`A_{uu}` is sparse and, in the node ordering of
:meth:`~.system.Layout.band_order` (interfaces interleaved, short side of the
grid fastest), banded: a pick couples the nodes within its offset only. It is
factored by LAPACK's banded Cholesky (``scipy.linalg.cholesky_banded``, in
every SciPy release this project supports) and the Schur complement
:math:`S` by a dense Cholesky; then [Golub & Van Loan 2013, s. 4.3, 3.2.11]

.. math::

    \\log\\det A = \\log\\det A_{uu} + \\log\\det S,

and :math:`A x = b` is solved by block elimination. The trend and velocity
columns couple every node; kept apart they do not widen the band, and a
general sparse LU (SuperLU with a minimum-degree ordering) need not order
around them. Where the band would be too wide (a fine node grid chosen by
hand) the node block is factored by that sparse LU instead.

References
----------
[Golub & Van Loan 2013] Golub, G. H. & Van Loan, C. F. (2013). Matrix
    Computations, 4th ed. Johns Hopkins University Press.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.linalg.lapack import dpotri, dtbtrs

__all__ = ["BAND_FLOPS", "NormalFactor", "band_positions", "node_band_order"]

# Largest banded Cholesky (n b^2 operations) taken before the sparse LU: the default covariance budget of the
# joint estimate (LayeredSettings.band_flops), the size the node grid is chosen for
BAND_FLOPS = 4e9


def node_band_order(spec, n_interfaces: int) -> np.ndarray:
    """Node ordering that keeps the node block banded: interfaces interleaved, short side of the grid fastest.

    Node ``j`` of interface ``s`` is unknown ``s * nx * ny + j`` (:class:`~.system.Layout`).
    """
    ny, nx = spec.shape
    node = np.arange(nx * ny).reshape(ny, nx)
    walk = node.T.ravel() if ny <= nx else node.ravel()  # rows fastest when the grid is wide
    return (np.arange(n_interfaces)[None, :] * nx * ny + walk[:, None]).ravel()


def band_positions(row, col, inverse_order):
    """Where the lower-triangle entries ``(row, col)`` of a symmetric matrix go in LAPACK lower band storage.

    Parameters
    ----------
    row, col : int arrays
        Entry indices in the original ordering.
    inverse_order : int array
        Position of each original index in the band ordering.

    Returns
    -------
    keep : bool array
        Entries on or below the diagonal in the band ordering (the others are their mirror images).
    diagonal, column : int arrays
        Band storage indices ``ab[diagonal, column]`` of the kept entries.
    """
    pr = inverse_order[row]
    pc = inverse_order[col]
    keep = pr >= pc
    return keep, (pr - pc)[keep], pc[keep]


class NormalFactor:
    """Factor of a symmetric positive definite normal matrix split as in the module notes.

    Parameters
    ----------
    nodes : tuple
        ``("band", ab, order)``: the node block in lower band storage in the
        ordering ``order`` (``ab[i - j, j] = A_uu[order[i], order[j]]``,
        overwritten); or ``("sparse", A_uu)``: a sparse matrix.
    A_us : array (n_nodes, n_small)
    A_ss : array (n_small, n_small)
    g : array (n_nodes + n_small,), optional
        A vector whose :math:`g^T A^{-1} g` is wanted (``quadratic_``); its
        node part is solved together with :math:`A_{us}`'s columns.

    Attributes
    ----------
    log_det : float
        :math:`\\log\\det A`.
    quadratic_ : float
        :math:`g^T A^{-1} g` (NaN without ``g``).

    Raises
    ------
    numpy.linalg.LinAlgError
        Where A is not positive definite.
    """

    def __init__(self, nodes, A_us, A_ss, g=None):
        n, n_small = A_us.shape
        self.n_nodes = n
        self.A_us = A_us
        # the other columns and g's node part in one solve (its cost is in reading the factor)
        cols = A_us if g is None else np.column_stack([A_us, np.asarray(g, float)[:n]])
        if nodes[0] == "band":
            # A_uu = C C^T (C lower): W = C^-1 A_us, S = A_ss - W^T W; only forward sweeps are needed here
            _, ab, order = nodes
            self.order = np.asarray(order, np.int64)
            self.cb = sla.cholesky_banded(ab, lower=True, overwrite_ab=True, check_finite=False)
            self.lu = None
            log_det_nodes = 2.0 * float(np.sum(np.log(self.cb[0])))
            Y = self._sweep(cols[self.order], "N")
            self.W = Y[:, :n_small]
            S = A_ss - self.W.T @ self.W
        else:
            self.cb = None
            self.lu = spla.splu(
                sp.csc_matrix(nodes[1]),
                permc_spec="MMD_AT_PLUS_A",
                diag_pivot_thresh=0.0,
                options={"SymmetricMode": True},
            )
            d = self.lu.U.diagonal()
            if np.any(~(d > 0)):
                raise np.linalg.LinAlgError("the node block of the normal matrix is not positive definite")
            log_det_nodes = float(np.sum(np.log(d)))
            Y = self.lu.solve(cols)
            self.U = Y[:, :n_small]  # A_uu^-1 A_us
            S = A_ss - A_us.T @ self.U
        self.cs = None
        self.log_det = log_det_nodes
        if S.size:
            self.cs = sla.cho_factor(0.5 * (S + S.T), lower=True, check_finite=False)
            self.log_det += 2.0 * float(np.sum(np.log(np.diag(self.cs[0]))))
        self.quadratic_ = float("nan")
        if g is not None:
            g = np.asarray(g, float)
            y = Y[:, n_small]
            if self.lu is None:  # g_u^T A_uu^-1 g_u = |C^-1 g_u|^2, and A_us^T A_uu^-1 g_u = W^T C^-1 g_u
                q, r = float(y @ y), g[n:] - self.W.T @ y
            else:
                q, r = float(g[:n] @ y), g[n:] - A_us.T @ y
            if self.cs is not None:
                q += float(r @ sla.cho_solve(self.cs, r, check_finite=False))
            self.quadratic_ = q

    def _sweep(self, rhs, trans):
        """Banded triangular solve with C ("N") or C^T ("T"), in the band ordering (LAPACK tbtrs)."""
        b = np.asarray(rhs, float)
        if b.size == 0:  # no columns (LAPACK would stop the process on an empty right-hand side)
            return b.copy()
        x, info = dtbtrs(self.cb, b if b.ndim == 2 else b[:, None], uplo="L", trans=trans)
        if info != 0:
            raise np.linalg.LinAlgError(f"banded triangular solve failed (LAPACK info {info})")
        return x if b.ndim == 2 else x[:, 0]

    @classmethod
    def of(cls, A, layout, damping: float = 0.0) -> NormalFactor:
        """Factor the sparse normal matrix ``A`` (nodes first, as in :class:`~.system.Layout`).

        See :meth:`of_blocks`.
        """
        n = layout.n_nodes
        A = sp.csr_matrix(A)
        return cls.of_blocks(A[:n, :n], A[:n, n:].toarray(), A[n:, n:].toarray(), layout, damping)

    @classmethod
    def of_blocks(cls, A_uu, A_us, A_ss, layout, damping: float = 0.0) -> NormalFactor:
        """Factor the normal matrix given by its blocks: sparse ``A_uu``, dense ``A_us`` and ``A_ss``.

        ``damping`` mu factors :math:`A + \\mu\\,\\mathrm{diag}(A)` instead (Levenberg-Marquardt).
        The arrays given are not changed.

        Raises
        ------
        numpy.linalg.LinAlgError
            Where A is not positive definite.
        """
        n = layout.n_nodes
        A_ss = np.array(A_ss, float)
        if damping:
            A_ss[np.diag_indices_from(A_ss)] += damping * np.diag(A_ss)
        C = sp.csr_matrix(A_uu)
        C.sum_duplicates()  # one entry per position: the band is filled by assignment
        C = C.tocoo()
        order = layout.band_order()
        inverse = np.empty(n, np.int64)
        inverse[order] = np.arange(n)
        keep, d, c = band_positions(C.row, C.col, inverse)
        b = int(d.max()) if d.size else 0
        if n * (b + 1) ** 2 > BAND_FLOPS:
            Auu = C.tocsr()
            if damping:
                Auu = Auu + sp.diags(damping * Auu.diagonal())
            return cls(("sparse", Auu), A_us, A_ss)
        ab = np.zeros((b + 1, n), order="F")  # LAPACK order: factored in place
        ab[d, c] = C.data[keep]
        if damping:
            ab[0] += damping * ab[0]  # the diagonal
        return cls(("band", ab, order), A_us, A_ss)

    @property
    def banded(self) -> bool:
        """True when the node block has the banded factor (not the sparse LU)."""
        return self.cb is not None

    def dense_inverse(self):
        """:math:`A^{-1}` as a dense array in the factor's ordering, and where each unknown went.

        The whole lower Cholesky factor of the permuted matrix is
        :math:`L = [[C, 0], [W^T, L_S]]` (C the banded factor of the node block,
        :math:`L_S` that of the Schur complement); LAPACK's ``potri`` turns it
        into the inverse [Golub & Van Loan 2013, s. 4.2]. For the many entries
        of :math:`A^{-1}` a leave-one-out check reads at once; p^2 numbers for
        p unknowns (the caller keeps p small).

        Returns
        -------
        inverse : array (p, p)
            :math:`A^{-1}` with the nodes in the band ordering, then the other unknowns.
        position : int array (p,)
            Row of ``inverse`` of each unknown of the original ordering.

        Raises
        ------
        numpy.linalg.LinAlgError
            For a factor of the sparse LU kind (no band), or when LAPACK fails.
        """
        if self.cb is None:
            raise np.linalg.LinAlgError("a dense inverse needs the banded factor")
        n = self.n_nodes
        n_small = self.W.shape[1]
        p = n + n_small
        L = np.zeros((p, p), order="F")
        b = self.cb.shape[0] - 1
        for d in range(b + 1):  # band storage: cb[d, j] = C[j + d, j]
            j = np.arange(n - d)
            L[j + d, j] = self.cb[d, : n - d]
        if n_small and self.cs is not None:  # the Schur complement has a factor whenever there are others
            L[n:, :n] = self.W.T
            L[n:, n:] = np.tril(self.cs[0])
        inv, info = dpotri(L, lower=1, overwrite_c=1)
        if info != 0:
            raise np.linalg.LinAlgError(f"inverse from the Cholesky factor failed (LAPACK info {info})")
        for i0 in range(0, p, 512):  # the upper triangle from the lower one, a block of rows at a time
            i1 = min(i0 + 512, p)
            block = inv[i0:i1, i0:i1]
            block[...] = np.tril(block) + np.tril(block, -1).T
            inv[i0:i1, i1:] = inv[i1:, i0:i1].T
        position = np.empty(p, np.int64)
        position[self.order] = np.arange(n)
        position[n:] = np.arange(n, p)
        return inv, position

    def others_solved(self):
        """:math:`A_{uu}^{-1} A_{us}` (n_nodes, n_small)."""
        if self.lu is not None:
            return self.U
        out = np.empty_like(self.W)
        out[self.order] = self._sweep(self.W, "T")
        return out

    def solve(self, rhs):
        """:math:`A^{-1}` rhs by block elimination (rhs of shape (n,) or (n, k))."""
        rhs = np.asarray(rhs, float)
        n = self.n_nodes
        if self.lu is not None:
            xu = self.lu.solve(rhs[:n])
            if self.cs is None:
                return xu
            xs = sla.cho_solve(self.cs, rhs[n:] - self.A_us.T @ xu, check_finite=False)
            return np.concatenate([xu - self.U @ xs, xs])
        # A = [[C, 0], [W^T, I]] diag(I, S) [[C^T, W], [0, I]]: forward, Schur, backward
        z = self._sweep(rhs[:n][self.order], "N")
        xs = np.zeros((0, *rhs.shape[1:]))
        if self.cs is not None:
            xs = sla.cho_solve(self.cs, rhs[n:] - self.W.T @ z, check_finite=False)
            z = z - self.W @ xs
        xu = np.empty_like(z)
        xu[self.order] = self._sweep(z, "T")
        return np.concatenate([xu, xs])
