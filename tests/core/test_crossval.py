"""The leave-one-line-out check of the interfaces' priors (core.tomography.crossval).

Checked against references outside the module: dense inverses (numpy) of a
small linear Gaussian problem for the left-out posterior means and
covariances (the linear Gaussian posterior, Tarantola 2005, s. 3.2), and
Monte Carlo draws from that same model for the statistic's mean (1 when the
prior is right: a calibrated predictive distribution) and its variance
(Isserlis' theorem for Gaussian fourth moments; Satterthwaite 1946 for the
equivalent degrees of freedom).
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from rockhead.core.tomography.crossval import held_out, pool

N_PARAM = 40  # a 1-D "interface" of 40 nodes
GROUPS = 4  # four "lines", each observing a quarter of it


def _problem(rng):
    """Prior precision (a first-difference smoothness prior plus a little ridge), rows, groups, readers."""
    D = sp.diags([-np.ones(N_PARAM - 1), np.ones(N_PARAM - 1)], [0, 1], shape=(N_PARAM - 1, N_PARAM))
    P = (D.T @ D * 4.0 + 0.05 * sp.identity(N_PARAM)).tocsc()
    rows, group = [], []
    for gi in range(GROUPS):
        lo = gi * N_PARAM // GROUPS
        for _ in range(12):  # each row averages two neighbouring nodes of its group's quarter
            j = lo + rng.integers(0, N_PARAM // GROUPS - 1)
            row = np.zeros(N_PARAM)
            row[j], row[j + 1] = 0.6, 0.4
            rows.append(row)
            group.append(f"L{gi}")
    J = sp.csr_matrix(np.array(rows) * 3.0)  # unit-variance weighted rows (noise sigma 1/3 of a unit)
    group = np.array(group)
    readers = {}
    for gi in range(GROUPS):
        lo = gi * N_PARAM // GROUPS
        W = np.zeros((3, N_PARAM))
        W[0, lo + 1] = W[1, lo + 4] = W[2, lo + 7] = 1.0
        readers[f"L{gi}", 0] = sp.csr_matrix(W)
    return P, J, group, readers


def _parts(J, r, group):
    """Each group's J_L^T J_L and J_L^T r_L."""
    out = {}
    for name in np.unique(group):
        Jl = J[np.flatnonzero(group == name)]
        out[name] = (Jl.T @ Jl, Jl.T @ r[group == name])
    return out


def test_left_out_means_and_covariances_match_dense_inverses():
    rng = np.random.default_rng(3)
    P, J, group, readers = _problem(rng)
    r = rng.normal(size=J.shape[0])
    dm = rng.normal(size=N_PARAM)
    A = (J.T @ J + P).tocsc()
    g = J.T @ r - P @ dm
    got = held_out(A, g, _parts(J, r, group), readers)
    Ad = A.toarray()
    for (name, key), W in readers.items():
        keep = group != name
        Jk = J.toarray()[keep]
        A_l = Jk.T @ Jk + P.toarray()
        g_l = Jk.T @ r[keep] - P @ dm
        e = W @ (np.linalg.solve(A_l, g_l) - np.linalg.solve(Ad, g))
        V = W.toarray() @ (np.linalg.inv(A_l) - np.linalg.inv(Ad)) @ W.toarray().T
        # 1e-9: two factorisations of a well-conditioned 40 x 40 system (condition ~1e3) agree to ~1e-12
        assert np.allclose(got[name, key][0], e, rtol=1e-9, atol=1e-12)
        assert np.allclose(got[name, key][1], V, rtol=1e-9, atol=1e-12)
        assert np.all(np.linalg.eigvalsh(V) > -1e-12)  # a covariance: leaving data out never gains precision


def test_woodbury_downdate_matches_a_factor_of_every_left_out_system():
    """The default (one dense inverse, each group by the Woodbury identity, Golub & Van Loan 2013, s. 2.1.4)
    against a fresh sparse LU of every A - J_L^T J_L, for one vector and for several columns."""
    rng = np.random.default_rng(5)
    P, J, group, readers = _problem(rng)
    A = (J.T @ J + P).tocsc()
    for r in (rng.normal(size=J.shape[0]), rng.normal(size=(J.shape[0], 3))):
        g = J.T @ r - (P @ rng.normal(size=(N_PARAM, *r.shape[1:])))
        parts = _parts(J, r, group)
        fast = held_out(A, g, parts, readers)
        slow = held_out(A, g, parts, readers, factor=lambda M: spla.splu(sp.csc_matrix(M)))
        assert fast.keys() == slow.keys()
        for key, (e, V) in slow.items():
            # a 40 x 40 system of condition ~1e3: the two ways agree to ~1e-13; 1e-10 leaves room for BLAS
            assert np.allclose(fast[key][0], e, rtol=1e-10, atol=1e-12)
            assert np.allclose(fast[key][1], V, rtol=1e-10, atol=1e-12)


def test_woodbury_downdate_reads_a_permuted_inverse():
    """An inverse given in another ordering (as the banded factor keeps it): the same differences."""
    rng = np.random.default_rng(8)
    P, J, group, readers = _problem(rng)
    A = (J.T @ J + P).tocsc()
    r = rng.normal(size=J.shape[0])
    g = J.T @ r
    parts = _parts(J, r, group)
    perm = rng.permutation(N_PARAM)  # unknown i at row position[i]
    position = np.empty(N_PARAM, np.int64)
    position[perm] = np.arange(N_PARAM)
    inv = np.linalg.inv(A.toarray())
    given = inv[np.ix_(perm, perm)]  # given[position[i], position[j]] = inv[i, j]
    got = held_out(A, g, parts, readers, inverse=(given, position))
    want = held_out(A, g, parts, readers, inverse=(inv, None))
    for key, (e, V) in want.items():
        # the same numbers read from other places: equal to rounding
        assert np.allclose(got[key][0], e, rtol=1e-12, atol=1e-14)
        assert np.allclose(got[key][1], V, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("sill_factor", [1.0, 0.5])
def test_ratio_is_one_when_the_prior_is_right_and_tracks_a_wrong_sill(sill_factor):
    """Truths drawn from the prior (times a factor): the pooled ratio's mean is that factor's square where the
    prior governs the prediction, and its spread is that of chi-square with the stated degrees of freedom."""
    rng = np.random.default_rng(11)
    P, J, group, readers = _problem(rng)
    L = np.linalg.cholesky(np.linalg.inv(P.toarray()))
    A = (J.T @ J + P).tocsc()
    draws = 400
    m = sill_factor * (L @ rng.standard_normal((N_PARAM, draws)))
    r = J @ m + rng.standard_normal((J.shape[0], draws))  # the residuals of the prior mean (zero), one column a draw
    held = held_out(A, J.T @ r, _parts(J, r, group), readers)  # every draw at once (columns)
    ratios, dofs = [], []
    for j in range(draws):
        ratio, n, dof = pool([(e[:, j], V) for e, V in held.values()])
        assert n == 3 * GROUPS  # every point read under every left-out group
        ratios.append(ratio)
        dofs.append(dof)
    ratios = np.array(ratios)
    mean, se = float(np.mean(ratios)), float(np.std(ratios) / np.sqrt(ratios.size))
    print(f"sill factor {sill_factor}: mean ratio {mean:.3f} +- {se:.3f}, dof {dofs[0]:.1f}")
    if sill_factor == 1.0:
        # calibrated: E[e^2 / V] = 1 exactly under the model; 4 standard errors of the Monte Carlo mean
        assert abs(mean - 1.0) < 4 * se
        # the stated degrees of freedom give the spread: Var = 2 / dof for chi2_dof / dof (Satterthwaite);
        # the sample variance of 400 draws is within ~15 % (its own relative standard error ~ sqrt(2/399)
        # times the kurtosis factor); 30 % allows for that
        assert np.var(ratios) == pytest.approx(2.0 / dofs[0], rel=0.3)
    else:
        # a truth rougher or smoother than the prior: the ratio moves towards the factor's square
        # (exactly so only where the prior alone sets the prediction; the picks' noise part stays)
        assert 0.25 < mean < 0.6
