"""Evidence-aware tests of an account's change, each turned into a comparable z-score.

Every component of the shift score asks one question of one account against its own
past and answers with a tail probability under an explicit count model, written as a
normal z-score (``z = Phi^-1(1 - p)``). Small counts are handled by the models
themselves: two events cannot make a small p-value, eighty new counterparts against a
usual two can. Nothing is divided by a spread that can shrink to zero, so scores do not
saturate and mean the same in every window and activity level.

* :func:`novelty_zscore` - a surge of new counterparts: the Poisson-gamma (negative
  binomial) predictive distribution of this window's count given the account's counts in
  its earlier windows, with a gamma prior estimated from the population (empirical
  Bayes; Robbins 1956, Efron & Morris 1975; the predictive as in Gelman et al., "Bayesian
  Data Analysis", 3rd ed., 2013, section 2.6; all as recalled), mid-p tail (Lancaster
  1961, as recalled).
* :func:`homogeneity_zscore` - a change of shape (new vs known counterparts, sent vs
  received): the G-test of homogeneity (log-likelihood ratio, Sokal & Rohlf "Biometry";
  the statistic of ``scipy.stats.chi2_contingency(lambda_="log-likelihood")``) between
  this window's counts and the baseline window's, the baseline smoothed toward the
  population's shares (a Dirichlet prior) so a near-empty baseline is not a certain one.
* :func:`role_shift_zscore` - a change of role mixture: the Hellinger (Freeman-Tukey)
  form of the chi-square statistic ``8 n_eff H^2`` (Cressie & Read, JRSS B 1984, as
  recalled) with ``n_eff`` the harmonic sample size of the two windows' events, scaled
  per activity stratum by genomic control (Devlin & Roeder, Biometrics 1999): mixtures are
  not multinomial samples, so the inflation of the statistic over its null is estimated
  from the stratum's median and divided out (never below 1).
* :func:`empirical_null` - per window, the central part of each component's z-scores is
  re-centred and re-scaled (Efron, JASA 2004, "large-scale simultaneous hypothesis
  testing: the choice of a null hypothesis"), only ever toward less evidence (centre at
  least 0, spread at least 1): a season week in which everybody meets more people does
  not raise everybody's score.
* :func:`combine_zscores` - the largest component, Sidak-corrected for the number of
  components the account has (Sidak, JASA 1967): the score is the z-score of "at least
  one of m tests this extreme".

Each test with a window-wide statistic (the prior, the population's shares, a median) is
also given as two halves, the statistic and ``*_given`` that applies it, so a window whose
accounts are split over workers computes the same scores
(:mod:`rolewatch.engine.scoring_parts`).

Pure: arrays in, arrays out; vectorised; no loop over accounts.
"""

from __future__ import annotations

import numpy as np
from scipy.special import ndtri_exp
from scipy.stats import chi2, nbinom, norm

__all__ = [
    "LOG_TAIL_MIN",
    "MAD_SCALE",
    "Z_FLOOR",
    "cell_shares",
    "combine_zscores",
    "empirical_null",
    "empirical_null_given",
    "g_statistic",
    "gamma_prior",
    "homogeneity_valid",
    "homogeneity_zscore",
    "homogeneity_zscore_given",
    "merged_rate_moments",
    "novelty_law",
    "novelty_valid",
    "novelty_zscore",
    "novelty_zscore_given",
    "rate_moments",
    "role_shift_statistic",
    "role_shift_valid",
    "role_shift_zscore",
    "role_shift_zscore_given",
    "z_from_log_tail",
]

MAD_SCALE = 1.4826  # normal consistency constant of the MAD (common practice; 1 / 0.6745)
# Accounts a per-account test computes at once: its temporary arrays stay a few MB long
# however many accounts the window has (common practice, no source).
SLICE_ROWS = 1 << 18
Z_FLOOR = -8.0  # lowest z reported (p within 1e-15 of 1 carries no more information)
LOG_TAIL_MIN = -1e5  # smallest log tail probability used: z stays finite (about 447)


def z_from_log_tail(log_p) -> np.ndarray:
    """Normal z-score of upper-tail probabilities given as logarithms (exact far in the
    tail: ``scipy.special.ndtri_exp``), floored at :data:`Z_FLOOR` and kept finite."""
    log_p = np.clip(np.asarray(log_p, dtype=np.float64), LOG_TAIL_MIN, 0.0)
    with np.errstate(over="ignore", invalid="ignore"):
        z = -ndtri_exp(log_p)
    return np.maximum(z, Z_FLOOR)


def gamma_prior(totals, windows) -> tuple[float, float]:
    """Shape and rate of a gamma law of per-window rates, by the method of moments.

    Each account's per-window rate ``totals / windows`` varies by the spread of the true
    rates plus Poisson noise of mean ``rate / windows``; the noise part is removed before
    matching the gamma's mean ``a / b`` and variance ``a / b**2``. Without spread beyond
    the noise the prior is nearly a point mass (shape 1e6).

    Parameters
    ----------
    totals, windows : ndarray
        Counts summed over each account's earlier windows, and how many windows.

    Returns
    -------
    (shape, rate) : floats
    """
    moments = merged_rate_moments([rate_moments(totals, windows)])
    return _prior_of(moments)


# rate_moments' entries: accounts, summed rates, squared deviations from the part's own
# mean rate, summed 1 / windows, summed current counts
_COUNT, _RATES, _SQUARES, _INVERSE, _CURRENT = range(5)


def rate_moments(totals, windows, current=None) -> np.ndarray:
    """The sums :func:`gamma_prior` and :func:`novelty_zscore` need, of one part of the
    accounts: ``[accounts, sum of rates, sum of squared deviations from this part's mean
    rate, sum of 1 / windows, sum of current]`` (rate: ``totals / windows``).

    Parts merge exactly by :func:`merged_rate_moments` (the parallel variance update of
    Chan, Golub & LeVeque, 1979, as recalled), so a window split over workers gets the
    prior of the whole window: one part gives numpy's own mean and variance to the bit,
    several differ only by the order of the additions.
    """
    totals = np.asarray(totals, dtype=np.float64)
    windows = np.asarray(windows, dtype=np.float64)
    rates = totals / windows
    count = float(rates.size)
    summed = float(np.sum(rates)) if rates.size else 0.0
    deviation = rates - (summed / count if rates.size else 0.0)
    squares = float(np.sum(deviation * deviation)) if rates.size else 0.0
    inverse = float(np.sum(1.0 / windows)) if rates.size else 0.0
    now = 0.0 if current is None or not rates.size else float(np.sum(current))
    return np.array([count, summed, squares, inverse, now])


def merged_rate_moments(parts) -> np.ndarray:
    """:func:`rate_moments` of several parts as one: ``[accounts, mean rate, variance of
    the rates, mean of 1 / windows, summed rates, summed current]``."""
    table = np.asarray(list(parts), dtype=np.float64).reshape(-1, 5)
    count = float(table[:, _COUNT].sum())
    if count == 0:
        return np.zeros(6)
    if table.shape[0] == 1:  # numpy's own arithmetic, to the bit
        summed, squares = float(table[0, _RATES]), float(table[0, _SQUARES])
    else:
        summed = float(np.sum(table[:, _RATES]))
        held = table[table[:, _COUNT] > 0]
        shift = held[:, _RATES] / held[:, _COUNT] - summed / count
        squares = float(np.sum(held[:, _SQUARES]) + np.sum(held[:, _COUNT] * shift * shift))
    mean = summed / count
    inverse = float(np.sum(table[:, _INVERSE])) / count
    current = float(np.sum(table[:, _CURRENT]))
    return np.array([count, mean, squares / count, inverse, summed, current])


def _prior_of(moments: np.ndarray) -> tuple[float, float]:
    """Gamma shape and rate from :func:`merged_rate_moments`."""
    count, mean, variance, inverse = (float(v) for v in moments[:4])
    if count == 0 or mean <= 0:
        return 1e6, 1e6 / 1e-6
    spread = variance - mean * inverse
    shape = mean * mean / spread if spread > 0 else 1e6
    shape = float(min(shape, 1e6))
    return shape, shape / mean


def novelty_law(moments: np.ndarray) -> tuple[float, float, float]:
    """The window's prior shape and rate and its growth (the valid accounts' count now
    over their summed mean rates) from :func:`merged_rate_moments` of the valid accounts
    (with their current counts)."""
    shape, rate = _prior_of(moments)
    expected, current = float(moments[4]), float(moments[5])
    growth = current / expected if expected > 0 else 1.0
    return shape, rate, max(growth, 1e-9)


def novelty_valid(current, history_total, history_windows, valid) -> np.ndarray:
    """The accounts :func:`novelty_zscore` scores: valid, with an earlier window, finite."""
    x = np.asarray(current, dtype=np.float64).reshape(-1)
    total = np.asarray(history_total, dtype=np.float64).reshape(-1)
    windows = np.asarray(history_windows, dtype=np.float64).reshape(-1)
    return np.asarray(valid, dtype=bool).reshape(-1) & (windows >= 1) & np.isfinite(x + total)


def novelty_zscore(current, history_total, history_windows, valid) -> np.ndarray:
    """How surprising this window's count is, given the account's own earlier windows.

    Parameters
    ----------
    current : ndarray, shape (n,)
        This window's count (e.g. new counterparts the account sent to).
    history_total, history_windows : ndarray, shape (n,)
        The same count summed over the account's earlier active windows, and how many.
    valid : ndarray of bool, shape (n,)
        Accounts to score (they need ``history_windows >= 1``).

    Returns
    -------
    ndarray, shape (n,)
        Mid-p upper-tail z-score; NaN where not valid.

    Notes
    -----
    Rates have a gamma prior (:func:`gamma_prior` over the valid accounts); after
    ``s`` counts in ``w`` windows an account's rate is ``Gamma(a + s, b + w)`` and the
    count of the next window, scaled by the window's overall growth ``g`` (the valid
    accounts' total now over their mean rate), is negative binomial with ``r = a + s`` and
    ``p = (b + w) / (b + w + g)``. The mid-p tail is ``P(X > x) + P(X = x) / 2``.
    """
    ok = novelty_valid(current, history_total, history_windows, valid)
    x = np.asarray(current, dtype=np.float64).reshape(-1)
    if not ok.any():
        return np.full(x.size, np.nan)
    total = np.asarray(history_total, dtype=np.float64).reshape(-1)
    windows = np.asarray(history_windows, dtype=np.float64).reshape(-1)
    moments = rate_moments(total[ok], windows[ok], x[ok])
    law = novelty_law(merged_rate_moments([moments]))
    return novelty_zscore_given(x, total, windows, ok, law)


def novelty_zscore_given(current, history_total, history_windows, ok, law) -> np.ndarray:
    """:func:`novelty_zscore` of the accounts ``ok`` (:func:`novelty_valid`) under the
    window's ``law`` (:func:`novelty_law`: prior shape, rate and growth), NaN elsewhere."""
    x = np.asarray(current, dtype=np.float64).reshape(-1)
    total = np.asarray(history_total, dtype=np.float64).reshape(-1)
    windows = np.asarray(history_windows, dtype=np.float64).reshape(-1)
    shape, rate, growth = law
    z = np.full(x.size, np.nan)
    if not ok.any():
        return z
    r = shape + total[ok]
    p = (rate + windows[ok]) / (rate + windows[ok] + growth)
    z[ok] = _by_slices(_mid_p_z, x[ok], r, p)
    return z


def _mid_p_z(x: np.ndarray, r: np.ndarray, p: np.ndarray) -> np.ndarray:
    """z-score of the negative binomial's mid-p upper tail ``P(X > x) + P(X = x) / 2``."""
    log_tail = np.logaddexp(nbinom.logsf(x, r, p), nbinom.logpmf(x, r, p) + np.log(0.5))
    return z_from_log_tail(log_tail)


def _by_slices(compute, *rows: np.ndarray) -> np.ndarray:
    """``compute`` of arrays that are one row per account, over slices of
    :data:`SLICE_ROWS` rows, joined: the same values as one call on every row (the tests
    are row by row), without temporaries the length of the whole window (scipy's
    distributions and the G statistic's tables make several)."""
    size = len(rows[0])
    if size <= SLICE_ROWS:
        return compute(*rows)
    return np.concatenate(
        [
            compute(*(column[start : start + SLICE_ROWS] for column in rows))
            for start in range(0, size, SLICE_ROWS)
        ]
    )


def g_statistic(current, baseline) -> np.ndarray:
    """G statistic of homogeneity of each row pair: ``2 sum O log(O / E)`` over the
    2 x C table ``[current[i], baseline[i]]`` (0 where the table is empty)."""
    table = np.stack([current, baseline], axis=1)  # n x 2 x C
    rows = table.sum(axis=2, keepdims=True)
    cols = table.sum(axis=1, keepdims=True)
    total = table.sum(axis=(1, 2), keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = rows * cols / total
        terms = np.where(table > 0, table * np.log(table / expected), 0.0)
    return np.maximum(2.0 * terms.sum(axis=(1, 2)), 0.0)


def homogeneity_zscore(current, baseline, valid, *, smoothing: float = 2.0) -> np.ndarray:
    """Whether the account's counts fall into the cells in another proportion than before.

    Parameters
    ----------
    current, baseline : ndarray, shape (n, C)
        Counts per cell in this window and in the baseline window.
    valid : ndarray of bool, shape (n,)
    smoothing : float
        Pseudo-counts added to the baseline, spread over the cells in the proportion of
        the valid accounts' current totals (a Dirichlet prior of that strength).

    Returns
    -------
    ndarray, shape (n,)
        z-score of the G-test's p-value (chi-square with ``C - 1`` degrees of freedom);
        NaN where not valid.
    """
    ok = homogeneity_valid(current, baseline, valid)
    cur = np.asarray(current, dtype=np.float64)
    if not ok.any() or cur.shape[1] < 2:
        return np.full(cur.shape[0], np.nan)
    shares = cell_shares(cur[ok].sum(axis=0))
    return homogeneity_zscore_given(cur, baseline, ok, shares, smoothing=smoothing)


def homogeneity_valid(current, baseline, valid) -> np.ndarray:
    """The accounts :func:`homogeneity_zscore` tests: valid, both rows finite."""
    cur = np.asarray(current, dtype=np.float64)
    base = np.asarray(baseline, dtype=np.float64)
    if cur.ndim != 2 or cur.shape != base.shape:
        raise ValueError(f"current and baseline must be n x C of one shape, got {cur.shape}")
    return np.asarray(valid, dtype=bool).reshape(-1) & np.isfinite(cur + base).all(axis=1)


def cell_shares(totals) -> np.ndarray:
    """Each cell's share of the tested accounts' current counts (``totals``: their column
    sums, added up over parts when the accounts are split), even when there are none."""
    totals = np.asarray(totals, dtype=np.float64)
    if totals.sum() > 0:
        return totals / totals.sum()
    return np.full(totals.size, 1 / totals.size)


def homogeneity_zscore_given(current, baseline, ok, shares, *, smoothing: float) -> np.ndarray:
    """:func:`homogeneity_zscore` of the accounts ``ok`` (:func:`homogeneity_valid`) with
    the baseline smoothed toward the window's ``shares`` (:func:`cell_shares`)."""
    cur = np.asarray(current, dtype=np.float64)
    base = np.asarray(baseline, dtype=np.float64)
    z = np.full(cur.shape[0], np.nan)
    if not ok.any() or cur.shape[1] < 2:
        return z
    g = _by_slices(
        lambda now, before: g_statistic(now, before + smoothing * shares), cur[ok], base[ok]
    )
    z[ok] = z_from_log_tail(chi2.logsf(g, cur.shape[1] - 1))
    return z


def role_shift_zscore(
    distance, current_events, baseline_events, strata, valid, *, n_roles: int
) -> np.ndarray:
    """Role-mixture shift as a chi-square z-score, inflation removed per activity stratum.

    Parameters
    ----------
    distance : ndarray, shape (n,)
        Hellinger-type distance between the current and baseline mixtures, in [0, 1].
    current_events, baseline_events : ndarray, shape (n,)
        Events of the account in the two windows.
    strata : ndarray of int, shape (n,)
        Activity stratum per account (-1: none), e.g.
        :func:`rolewatch.engine.scoring.activity_strata`.
    valid : ndarray of bool, shape (n,)
    n_roles : int
        Roles of the basis (the statistic has ``n_roles - 1`` degrees of freedom).

    Returns
    -------
    ndarray, shape (n,)
        NaN where not valid.
    """
    stat = role_shift_statistic(distance, current_events, baseline_events)
    groups = np.asarray(strata, dtype=np.int64)
    ok = role_shift_valid(stat, groups, valid)
    if not ok.any():
        return np.full(stat.size, np.nan)
    medians = np.full(int(groups[ok].max()) + 1, np.nan)
    for group in np.unique(groups[ok]):
        medians[group] = np.median(stat[ok & (groups == group)])
    return role_shift_zscore_given(stat, groups, ok, medians, n_roles=n_roles)


def role_shift_statistic(distance, current_events, baseline_events) -> np.ndarray:
    """``8 n_eff d^2`` per account (``n_eff``: the harmonic sample size of its events)."""
    d = np.asarray(distance, dtype=np.float64)
    a = np.asarray(current_events, dtype=np.float64)
    b = np.asarray(baseline_events, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        n_eff = np.where(a + b > 0, a * b / (a + b), 0.0)
    return 8.0 * n_eff * d * d


def role_shift_valid(stat, strata, valid) -> np.ndarray:
    """The accounts :func:`role_shift_zscore` scores: valid, finite, in a stratum."""
    groups = np.asarray(strata, dtype=np.int64)
    return np.asarray(valid, dtype=bool) & np.isfinite(stat) & (groups >= 0)


def role_shift_zscore_given(stat, strata, ok, medians, *, n_roles: int) -> np.ndarray:
    """:func:`role_shift_zscore` of the accounts ``ok`` (:func:`role_shift_valid`) given
    each stratum's median statistic (``medians[stratum]``, over the whole window)."""
    groups = np.asarray(strata, dtype=np.int64)
    z = np.full(stat.size, np.nan)
    if not ok.any():
        return z
    df = max(int(n_roles) - 1, 1)
    inflation = np.maximum(np.asarray(medians, dtype=np.float64) / chi2.median(df), 1.0)
    z[ok] = z_from_log_tail(chi2.logsf(stat[ok] / inflation[groups[ok]], df))
    return z


def empirical_null(z, valid) -> tuple[np.ndarray, float, float]:
    """Re-standardise a window's z-scores by their central part, toward less evidence only.

    ``(z - centre) / spread`` with ``centre = max(median, 0)`` and
    ``spread = max(1.4826 * MAD, 1)`` over the valid, finite scores.

    Returns
    -------
    (z, centre, spread)
    """
    values = np.asarray(z, dtype=np.float64)
    ok = np.asarray(valid, dtype=bool) & np.isfinite(values)
    if not ok.any():
        return np.full(values.size, np.nan), 0.0, 1.0
    median = float(np.median(values[ok]))
    deviation = float(np.median(np.abs(values[ok] - median)))
    return empirical_null_given(values, ok, median, deviation)


def empirical_null_given(z, ok, median: float, deviation: float):
    """:func:`empirical_null` of the scores ``ok`` (valid and finite) given the window's
    median of them and median absolute deviation from it."""
    values = np.asarray(z, dtype=np.float64)
    out = np.full(values.size, np.nan)
    centre = max(float(median), 0.0)
    spread = max(MAD_SCALE * float(deviation), 1.0)
    out[ok] = (values[ok] - centre) / spread
    return out, centre, spread


def combine_zscores(components) -> tuple[np.ndarray, np.ndarray]:
    """The largest of ``m`` component z-scores, Sidak-corrected for ``m``.

    Parameters
    ----------
    components : ndarray, shape (c, n)
        One row per component; NaN where a component does not apply to an account (``m``
        counts the finite ones).

    Returns
    -------
    (score, strongest)
        ``score`` is ``Phi^-1(1 - p)`` with ``p = 1 - (1 - p_min)**m``, NaN where no
        component is finite; ``strongest`` the row of the largest component (-1 if none).
    """
    Z = np.asarray(components, dtype=np.float64)
    if Z.ndim != 2:
        raise ValueError(f"components must be a c x n array, got shape {Z.shape}")
    if Z.shape[1] > SLICE_ROWS:  # account by account: slices keep the temporaries small
        parts = [
            _combined(Z[:, start : start + SLICE_ROWS])
            for start in range(0, Z.shape[1], SLICE_ROWS)
        ]
        return np.concatenate([part[0] for part in parts]), np.concatenate(
            [part[1] for part in parts]
        )
    return _combined(Z)


def _combined(Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`combine_zscores` of a c x n block."""
    finite = np.isfinite(Z)
    m = finite.sum(axis=0)
    filled = np.where(finite, Z, -np.inf)
    strongest = np.where(m > 0, np.argmax(filled, axis=0), -1)
    best = filled.max(axis=0, initial=-np.inf)
    log_p = norm.logsf(np.where(m > 0, best, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = np.log(-np.expm1(m * np.log1p(-np.exp(log_p))))
    # far in the tail 1 - (1 - p)**m = m p to double precision (and exp(log_p) underflows)
    log_p_any = np.where(log_p < -30.0, np.log(np.maximum(m, 1)) + log_p, exact)
    score = np.where(m > 0, z_from_log_tail(log_p_any), np.nan)
    return score, strongest
