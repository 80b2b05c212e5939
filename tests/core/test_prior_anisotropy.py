"""The anisotropic Matern lattice prior and the evidence it is tuned by (core.tomography.prior, evidence).

Checked against:
- the five-point Laplacian (the isotropic operator) and a brute-force midpoint
  sum of the lattice spectral integral (its symbol, numpy only);
- the continuum geometric-anisotropy Matern correlation (distances stretched
  along the axes; Lindgren, Rue & Lindstrom 2011, s. 3.4) through
  scipy.special.kv;
- numpy.linalg.slogdet of the dense precision;
- the exact marginal likelihood of a linear-Gaussian model (a dense
  multivariate normal density, scipy.stats.multivariate_normal), which the
  Laplace approximation must equal for linear data [Rasmussen & Williams 2006,
  eq. 2.30].
"""

import math

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from rockhead.core.grid import GridSpec
from rockhead.core.tomography import evidence, prior
from scipy import stats
from scipy.special import gamma, kv


def _continuum_correlation(d_m, range_m, nu):
    """Matern correlation 2^(1-nu)/Gamma(nu) (kappa d)^nu K_nu(kappa d), kappa = sqrt(8 nu)/range (scipy's kv)."""
    kd = math.sqrt(8 * nu) / range_m * d_m
    return 2 ** (1 - nu) / gamma(nu) * kd**nu * kv(nu, kd)


def test_isotropic_tensor_gives_the_five_point_laplacian():
    g = GridSpec(0.0, 0.0, 3.0, 9, 7)
    five = prior.lattice_laplacian(g)
    assert abs(five - prior.lattice_laplacian(g, np.eye(2))).max() == 0.0
    # the five-point stencil: 4 in the interior, -1 to each of the four neighbours (zero-flux edges)
    dense = five.toarray()
    c = 3 * 9 + 4
    assert dense[c, c] == 4.0 and dense[c, c + 1] == dense[c, c - 9] == -1.0
    assert np.allclose(dense.sum(axis=1), 0.0)


@pytest.mark.parametrize("azimuth_deg, ratio", [(0.0, 4.0), (30.0, 3.0), (120.0, 2.0)], ids=["north", "30", "120"])
def test_anisotropic_lattice_variance_against_a_brute_force_sum(azimuth_deg, ratio):
    pr = prior.MaternPrior(1.0, 40.0, 0.0, "", 2, ratio, azimuth_deg)
    H = pr.tensor()
    assert np.linalg.det(H) == pytest.approx(1.0)  # area-preserving stretch: the continuum variance is unchanged
    k, h = pr.kappa_per_m, 4.0
    # midpoint sum over 2000 x 2000 wavenumbers of the operator's symbol (periodic, smooth: converges fast)
    n = 2000
    w = (np.arange(n) + 0.5) / n * 2 * np.pi - np.pi
    s, sn = np.sin(w / 2) ** 2, np.sin(w)
    lam = 4 * H[0, 0] * s[:, None] + 4 * H[1, 1] * s[None, :] + 2 * H[0, 1] * sn[:, None] * sn[None, :]
    brute = h**4 * np.mean((k * k * h * h + lam) ** -3.0)
    # 1e-8: the brute-force sum's own error at 2000 points (measured at most 1e-11 at 4000)
    assert prior.anisotropic_lattice_variance(k, h, H, 3) == pytest.approx(brute, rel=1e-8)


@pytest.mark.parametrize("nu", [1, 2])
def test_anisotropic_prior_has_the_stated_variance_and_stretched_correlation(nu):
    g = GridSpec(0.0, 0.0, 4.0, 81, 81)
    pr = prior.MaternPrior(2.0, 40.0, 0.0, "", nu, 3.0, 30.0)
    Q = prior.matern_precision(g, pr).tocsc()
    c = 40 * 81 + 40
    e = np.zeros(81 * 81)
    e[c] = 1.0
    col = spla.spsolve(Q, e)
    assert col[c] == pytest.approx(4.0, rel=0.01)  # sigma^2 at an interior node; the far edges add < 1 %
    t = math.radians(30.0)
    major = np.array([math.sin(t), math.cos(t)])
    minor = np.array([major[1], -major[0]])
    corr = []
    for direction in (major, minor):
        for dist in (12.0, 24.0):
            dc, dr = round(dist * direction[0] / 4.0), round(-dist * direction[1] / 4.0)  # row 0 is north
            off = np.array([dc * 4.0, -dr * 4.0])
            stretched = math.hypot(off @ major / math.sqrt(3.0), off @ minor * math.sqrt(3.0))
            corr.append((col[c + dr * 81 + dc] / col[c], _continuum_correlation(stretched, 40.0, nu)))
    got, want = np.array(corr).T
    # the lattice approximates the continuum within a few hundredths where the minor range spans
    # 6 nodes or more (23 m / 4 m here); 0.06 allows for the off-axis nodes' discretisation
    assert np.allclose(got, want, atol=0.06), (got, want)
    # and it is anisotropic: at 24 m the major axis keeps far more correlation than the minor one
    assert got[1] > got[3] + 0.3


def test_log_determinant_matches_numpy():
    g = GridSpec(0.0, 0.0, 5.0, 12, 10)
    for pr in (prior.MaternPrior(1.5, 30.0, 0.0, "", 1), prior.MaternPrior(0.7, 40.0, 0.0, "", 2, 4.0, 65.0)):
        Q = prior.matern_precision(g, pr).toarray()
        sign, want = np.linalg.slogdet(Q)
        assert sign > 0
        assert evidence.log_det_matern(g, pr) == pytest.approx(want, rel=1e-9, abs=1e-6)


def test_the_evidence_is_the_exact_marginal_likelihood_of_linear_data():
    """For data linear in the nodes the Laplace evidence is exact (Rasmussen & Williams 2006, eq. 2.30)."""
    rng = np.random.default_rng(3)
    g = GridSpec(0.0, 0.0, 5.0, 8, 7)
    n = 56
    pr = prior.MaternPrior(1.2, 20.0, 0.0, "", 2, 2.5, 40.0)
    Q = prior.matern_precision(g, pr)
    C = np.linalg.inv(Q.toarray())
    J = sp.random(30, n, density=0.2, random_state=4, format="csr")  # weighted sensitivities (1/sigma folded in)
    d = J @ rng.multivariate_normal(np.zeros(n), C) + rng.normal(size=30)
    want = stats.multivariate_normal(np.zeros(30), J.toarray() @ C @ J.toarray().T + np.eye(30)).logpdf(d)

    class Lin(evidence._Linearised):  # the linearised problem at m = 0, without trends or velocities
        def __init__(self):
            self.JtJ, self.Jtr, self.rr = (J.T @ J).tocsr(), J.T @ d, float(d @ d)
            self.dm, self.P0, self.BtB = np.zeros(n), sp.csr_matrix((0, 0)), None
            self.layout = type("L", (), {"spec": g})()
            self._prior_cache = {}

    # the evidence leaves out the data's own normalising constant -n/2 ln(2 pi) (the same for every prior)
    assert Lin().log_evidence([pr]) - 15 * math.log(2 * math.pi) == pytest.approx(want, rel=1e-9)


def test_bic_weights_are_the_softmax_of_minus_half_bic():
    """Posterior model probabilities from BIC (Kass & Raftery 1995): exp(-BIC/2), normalised; scipy's softmax."""
    from rockhead.core.tomography.averaging import bic_weights
    from scipy.special import softmax

    bic = np.array([61.4, 65.3, 71.2, 76.1, 1200.0])
    assert bic_weights(bic) == pytest.approx(softmax(-0.5 * bic), rel=1e-12, abs=1e-300)
    # a BIC lower by 6 ("strong" evidence) is 20 times more probable
    w = bic_weights([0.0, 6.0])
    assert w[0] / w[1] == pytest.approx(math.exp(3.0))


def test_tuning_keeps_the_start_priors_when_the_evidence_cannot_be_evaluated(monkeypatch):
    """A singular linearised problem leaves the variogram's priors in place: a note, not a failed run."""

    class Singular:
        def __init__(self, *args, **kwargs):
            pass

        def log_evidence(self, priors):
            return -np.inf

    monkeypatch.setattr(evidence, "_Linearised", Singular)
    layout = type("Layout", (), {"spec": GridSpec(0.0, 0.0, 5.0, 8, 7), "n_interfaces": 1})()
    start = [prior.MaternPrior(1.0, 30.0, 0.0, "variogram", 2)]
    out, before, after = evidence.tune_priors(layout, None, None, start)
    assert out == start and not np.isfinite(before) and not np.isfinite(after)
