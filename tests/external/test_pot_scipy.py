"""service.thresholds' peaks-over-threshold fit against scipy.

Sources: Siffer et al., "Anomaly Detection in Streams with Extreme Value Theory", KDD 2017
(excesses over an initial threshold t follow a generalized Pareto distribution; quantile
z_q = t + (sigma/gamma) * ((q n / N_t)^(-gamma) - 1)); scipy.stats.genpareto (shape c is
the same gamma/xi, scale sigma; `fit` with floc=0 is its maximum-likelihood fit).
"""

from __future__ import annotations

import numpy as np
import pytest

scipy_stats = pytest.importorskip("scipy.stats")
genpareto = scipy_stats.genpareto

from service.thresholds import fit_gpd, fit_tail, gpd_loglik  # noqa: E402


@pytest.mark.parametrize("shape", [-0.25, 0.0, 0.2, 0.45])
def test_fit_gpd_matches_scipy_maximum_likelihood(shape: float) -> None:
    rng = np.random.default_rng(11)
    excess = genpareto.rvs(shape, loc=0.0, scale=0.7, size=3000, random_state=rng)
    gamma, sigma, loglik = fit_gpd(excess)
    c_ref, loc_ref, scale_ref = genpareto.fit(excess, floc=0.0)  # scipy.stats.genpareto.fit (MLE)
    assert loc_ref == 0.0
    ll_ref = float(np.sum(genpareto.logpdf(excess, c_ref, loc=0.0, scale=scale_ref)))
    # Both are maximum-likelihood estimates of the same model: same optimum.
    assert gamma == pytest.approx(c_ref, abs=0.01)
    assert sigma == pytest.approx(scale_ref, rel=0.01)
    assert loglik >= ll_ref - 1e-3 * abs(ll_ref)
    # Our log-likelihood formula agrees with scipy's density at the same parameters.
    ll_ours_at_ref = gpd_loglik(excess, c_ref, scale_ref)
    assert ll_ours_at_ref == pytest.approx(ll_ref, rel=1e-9, abs=1e-6)


def test_pot_quantile_matches_scipy_ppf() -> None:
    """z_q (Siffer et al. 2017) = t + GPD quantile of the excess at 1 - q n / N_t (scipy ppf)."""
    rng = np.random.default_rng(5)
    scores = rng.gamma(2.0, 0.5, size=20000)
    fit = fit_tail(scores)  # initial threshold at the 98% quantile, as in Siffer et al. 2017
    assert fit.t == pytest.approx(float(np.quantile(scores, 0.98)))
    assert fit.n == 20000 and fit.n_peaks == int(np.sum(scores > fit.t))
    for q in (1e-3, 1e-4, 1e-6):
        p_excess = q * fit.n / fit.n_peaks
        ref = fit.t + genpareto.ppf(1.0 - p_excess, fit.gamma, loc=0.0, scale=fit.sigma)  # scipy.stats.genpareto.ppf
        assert fit.quantile(q) == pytest.approx(ref, rel=1e-9)
        # And the way back: exceedance(z_q) = q (the survival function times N_t / n).
        assert fit.exceedance(fit.quantile(q)) == pytest.approx(q, rel=1e-6)
        sf = genpareto.sf(fit.quantile(q) - fit.t, fit.gamma, loc=0.0, scale=fit.sigma) * fit.n_peaks / fit.n
        assert fit.exceedance(fit.quantile(q)) == pytest.approx(sf, rel=1e-6)
