"""The count-model tests behind the shift score, against scipy references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from rolewatch.engine.calibration import (
    combine_zscores,
    empirical_null,
    g_statistic,
    gamma_prior,
    homogeneity_zscore,
    novelty_zscore,
    role_shift_zscore,
)


@pytest.fixture(params=[None, 7], ids=["whole", "in-slices"])
def slice_rows(request, monkeypatch):
    """Each per-account computation at once, and in slices of 7 accounts (the same
    values are expected either way)."""
    if request.param is not None:
        import rolewatch.engine.calibration as calibration

        monkeypatch.setattr(calibration, "SLICE_ROWS", request.param)


def test_novelty_tail_is_the_poisson_gamma_predictive(slice_rows):
    # Reference: the predictive law of a count given s counts in w windows under a
    # Gamma(a, b) prior on the rate, integrated numerically with scipy:
    # P(X > x) = integral of Poisson-sf(x; g*lam) * Gamma(lam; a + s, rate b + w) dlam (and
    # P(X = x) likewise), the mid-p tail P(X > x) + P(X = x) / 2 turned into a z-score with
    # scipy.stats.norm.
    rng = np.random.default_rng(0)
    totals = rng.poisson(rng.gamma(2.0, 2.0, 400) * 3)
    windows = np.full(400, 3.0)
    current = rng.poisson(rng.gamma(2.0, 2.0, 400))
    current[:3] = [0, 9, 40]
    totals[:3] = [3, 3, 3]
    z = novelty_zscore(current, totals, windows, np.ones(400, dtype=bool))
    a, b = gamma_prior(totals, windows)
    growth = current.sum() / np.sum(totals / windows)
    for i in range(3):
        density = stats.gamma(a + totals[i], scale=1 / (b + windows[i]))

        def mixed(poisson_part, density=density):
            return integrate.quad(
                lambda lam: poisson_part(growth * lam) * density.pdf(lam),
                0,
                np.inf,
                limit=400,
                epsabs=0,
                epsrel=1e-10,
            )[0]

        above = mixed(lambda mu, x=current[i]: stats.poisson.sf(x, mu))
        at = mixed(lambda mu, x=current[i]: stats.poisson.pmf(x, mu))
        assert z[i] == pytest.approx(stats.norm.isf(above + at / 2), abs=2e-3)


def test_gamma_prior_recovers_the_rates_spread():
    # Reference: rates drawn by scipy/numpy from Gamma(shape 2, rate 0.5), counts Poisson
    # over 4 windows; the method of moments must find the shape and rate again (loosely).
    rng = np.random.default_rng(1)
    rates = rng.gamma(2.0, 2.0, 20000)
    totals = rng.poisson(rates * 4)
    shape, rate = gamma_prior(totals, np.full(totals.size, 4.0))
    assert shape == pytest.approx(2.0, rel=0.1)
    assert rate == pytest.approx(0.5, rel=0.1)


def test_small_counts_cannot_make_a_large_novelty_score():
    # Evidence-aware by construction: 2 usual new counterparts a window, now 4, is nothing;
    # now 80 is overwhelming (the rest of the population is steady at about 2).
    rng = np.random.default_rng(2)
    n = 500
    totals = rng.poisson(2.0 * 4, n).astype(float)
    current = rng.poisson(2.0, n).astype(float)
    totals[:2], current[:2] = 8, [4, 80]
    z = novelty_zscore(current, totals, np.full(n, 4.0), np.ones(n, dtype=bool))
    assert z[0] < 2.0 and z[1] > 10.0
    assert np.isfinite(z).all()


def test_g_statistic_matches_scipy_chi2_contingency():
    # Reference: scipy.stats.chi2_contingency with lambda_="log-likelihood" (the G-test),
    # no continuity correction.
    rng = np.random.default_rng(4)
    current = rng.integers(0, 30, (25, 4)).astype(float)
    baseline = rng.integers(1, 30, (25, 4)).astype(float)
    current[:, 0] += 1  # no all-zero column in any table
    g = g_statistic(current, baseline)
    for i in range(25):
        table = np.vstack([current[i], baseline[i]])
        keep = table.sum(axis=0) > 0
        expected = stats.chi2_contingency(
            table[:, keep], correction=False, lambda_="log-likelihood"
        )[0]
        assert g[i] == pytest.approx(expected, rel=1e-9)


def test_homogeneity_zscore_is_the_chi_square_tail(slice_rows):
    # Reference: scipy.stats.chi2.sf with C - 1 degrees of freedom, then norm.isf; the G
    # statistic of each row from scipy.stats.chi2_contingency(lambda_="log-likelihood").
    current = np.array([[0.0, 60.0, 1.0, 3.0], [3.0, 2.0, 2.0, 1.0]])
    baseline = np.array([[4.0, 1.0, 3.0, 1.0], [3.0, 1.0, 2.0, 1.0]])
    current = np.vstack([current, np.random.default_rng(2).integers(1, 20, (18, 4))])
    baseline = np.vstack([baseline, np.random.default_rng(3).integers(1, 20, (18, 4))])
    z = homogeneity_zscore(current, baseline, np.ones(20, dtype=bool), smoothing=0.0)
    g = [
        stats.chi2_contingency(
            np.vstack([now, before]), correction=False, lambda_="log-likelihood"
        )[0]
        for now, before in zip(current, baseline, strict=True)
    ]
    np.testing.assert_allclose(z, stats.norm.isf(stats.chi2.sf(g, 3)), rtol=1e-6)
    assert z[0] > 5 and z[1] < 0


def test_role_shift_statistic_is_chi_square_under_multinomial_sampling():
    # Under the null (both windows' events drawn from one multinomial over k roles), the
    # Hellinger statistic 8 n_eff H^2 is approximately chi-square with k - 1 degrees of
    # freedom (Cressie & Read 1984, as recalled). Reference: scipy.stats.kstest against
    # scipy.stats.chi2; the z-scores must then look standard normal.
    rng = np.random.default_rng(6)
    k, n = 4, 4000
    p = np.array([0.4, 0.3, 0.2, 0.1])
    a, b = 200, 300
    x = rng.multinomial(a, p, n) / a
    y = rng.multinomial(b, p, n) / b
    h = np.sqrt(0.5 * np.sum((np.sqrt(x) - np.sqrt(y)) ** 2, axis=1))
    stat = 8 * (a * b / (a + b)) * h**2
    assert stats.kstest(stat, stats.chi2(k - 1).cdf).statistic < 0.03
    z = role_shift_zscore(
        h, np.full(n, a), np.full(n, b), np.zeros(n, dtype=int), np.ones(n, bool), n_roles=k
    )
    assert abs(np.median(z)) < 0.1 and 0.9 < np.std(z[np.abs(z) < 4]) < 1.1


def test_role_shift_inflation_is_divided_out_per_stratum():
    # A stratum whose statistics are all three times the chi-square's (mixtures are not
    # multinomial samples) is scaled back; a clean stratum is left alone (never below 1).
    rng = np.random.default_rng(7)
    n, k = 3000, 5
    stat = stats.chi2(k - 1).rvs(n, random_state=rng)
    strata = np.repeat([0, 1], n // 2)
    stat[strata == 1] *= 3
    events = np.full(n, 50.0)
    n_eff = 25.0
    distance = np.sqrt(stat / (8 * n_eff))
    z = role_shift_zscore(distance, events, events, strata, np.ones(n, bool), n_roles=k)
    for group in (0, 1):
        assert abs(np.median(z[strata == group])) < 0.1


def test_empirical_null_only_ever_lowers_evidence():
    rng = np.random.default_rng(8)
    wide = rng.normal(1.0, 2.0, 5000)
    out, centre, spread = empirical_null(wide, np.ones(5000, bool))
    assert centre == pytest.approx(1.0, abs=0.1) and spread == pytest.approx(2.0, rel=0.05)
    narrow = rng.normal(-0.5, 0.5, 5000)
    out, centre, spread = empirical_null(narrow, np.ones(5000, bool))
    assert centre == 0.0 and spread == 1.0
    np.testing.assert_allclose(out, narrow)


def test_combine_is_the_sidak_corrected_maximum(slice_rows):
    # Reference: 1 - (1 - p_min)**m with p from scipy.stats.norm, for moderate values.
    components = np.array([[1.0, 3.0, np.nan, 5.0], [2.5, np.nan, np.nan, 45.0]])
    score, strongest = combine_zscores(components)
    p1 = stats.norm.sf(2.5)
    assert score[0] == pytest.approx(stats.norm.isf(1 - (1 - p1) ** 2))
    assert score[1] == pytest.approx(3.0)
    assert np.isnan(score[2]) and strongest[2] == -1
    assert strongest.tolist()[:2] == [1, 0]
    # far in the tail the correction is log(m) on the log scale, and stays finite
    assert np.isfinite(score[3]) and 44.9 < score[3] < 45.0
    # more accounts than a slice holds: each one as the reference gives it
    many = np.tile(components[:, :3], 6)
    score, strongest = combine_zscores(many)
    assert score[::3] == pytest.approx([stats.norm.isf(1 - (1 - p1) ** 2)] * 6)
    np.testing.assert_array_equal(strongest, [1, 0, -1] * 6)
