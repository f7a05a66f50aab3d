"""Wear trends for many short series at once: fits, steps, pooling and limit projections.

A *series* is one cylinder's compression (y, kPa) against engine hours (x) on one unit, pooled
within its *group* (engine family). Functions take flat per-reading arrays for the whole fleet
and use bincount sums, group cumsums and sorts, never a loop per series. No database here.

Rules of the trend engine (``fit_fleet``); (b) marks choices made here, no published source:

* OLS per series, centred corrected two-pass sums (domain.md §6.1; (a) Montgomery, Peck &
  Vining ch. 2); s needs n >= 3. Theil-Sen and Sen's interval as ``scipy.stats.theilslopes``
  (§6.3; (a) Sen 1968 eq. 2.6).
* Step (D11, §6.5): a reading below the lower bound of the two-sided 95 % prediction interval
  of the OLS fit of the earlier readings of its segment, with the fit's own s after >= 3
  readings, the family's pooled s (and df) after exactly 2, not judged otherwise. The step
  reading starts a new segment, confirmed or not (conservative for planning); void a test a
  retest shows to be an artefact. Fits, pooling and projections use the current segment. (b)
* Family noise: s pooled as sqrt(sum SSE / sum (n - 2)) over all segments with n >= 3 in the
  family (after step detection). Series with n = 2 take it as s, so SE = s/sqrt(Sxx). (b)
* Pooling per family: DerSimonian-Laird tau^2 and mu_RE; B = tau^2/(tau^2 + se^2); shrunk
  slope B*b + (1 - B)*mu_RE with variance B*se^2 + (1 - B)^2*Var(mu_RE) (posterior given tau,
  flat prior on mu: (a) Gelman et al., Bayesian Data Analysis 3rd ed. ch. 5, section (c)). No
  own slope: mu_RE, variance tau^2 + Var(mu_RE). Fewer than 2 usable series: no pooling.
* Faster than family: (b - mu_RE)/sqrt(se^2 + tau^2) < -z(0.95), one-sided. (b)
* ``slope_source``, the slope projected (b):
  ``pooled_short`` n < 5: the shrunk slope (a short series' own slope is mostly noise);
  ``ols_faster_than_family`` n < 5 but faster than the family: pooling's exchangeability is
  rejected and shrinking would hide fast wear; ``ols_no_family`` n < 5, nothing to pool with;
  ``ols`` n >= 5; ``theil_sen_outlier`` n >= 5 with a stray reading (Bonferroni outlier test:
  an externally studentised residual beyond t(1 - 0.05/(2n), n - 3), (a) Montgomery, Peck &
  Vining ch. 4, section (c)) or |Theil-Sen - OLS| > 2 SE(OLS): Theil-Sen's line (through
  median(y) - b*median(x)) with the OLS variances, which the stray inflates (conservative);
  ``none``: no slope. The SE test alone cannot catch one stray, which inflates SE(OLS) along
  with the shift: with evenly spaced hours and the rest on a line the ratio is at most
  sqrt(3), for any n (domain.md §9 item 21 has exactly that); the outlier test has a known
  5 % false-alarm rate per clean series.
* Lower-limit crossing (§6.2, D12; (a) Fieller 1954): ``cross_point`` where the line meets the
  limit, only if the slope is negative and significant at one-sided 95 % (g < 1);
  ``cross_planning`` where the one-sided 95 % lower prediction bound of one reading (k = 1)
  meets it. NaN: no projected crossing. An hour at or before the last test: already there.

For an upper limit (leak-down percent) pass -y and -limit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import special

__all__ = [
    "FLEET_COLUMNS", "crossing_hours", "dersimonian_laird", "detect_steps", "detect_steps_again",
    "fit_ols", "fit_ols_through_origin", "fit_theil_sen", "pool_slopes", "pooled_residual_sd",
    "project_crossings", "shrink",
]

ArrayLike = Sequence[float] | np.ndarray | pd.Series | pd.Index

#: Below this many readings in the current segment the projection uses the pooled slope. (b)
SHORT_SERIES_N = 5
#: |Theil-Sen - OLS| above this many SE(OLS): Theil-Sen drives the projection. (b)
THEIL_SEN_OUTLIER_SE = 2.0
#: Columns of ``fleetfit.fit_fleet``'s result, in order.
FLEET_COLUMNS = [
    "family", "n", "n_total", "steps", "last_step_x", "last_x", "limit",
    "ols_slope", "ols_intercept", "ols_se", "resid_sd", "resid_df", "noise_source",
    "ts_slope", "ts_intercept", "ts_low", "ts_high",
    "pooled_slope", "pooled_se", "shrinkage", "family_mu", "family_mu_se", "family_tau2",
    "family_z", "family_noise_sd", "family_noise_df", "faster_than_family", "stray_reading",
    "slope", "slope_se", "slope_source",
    "cross_point", "cross_planning", "cross_pi_early", "cross_pi_late", "cross_mean_early",
    "cross_mean_late",
]


# --------------------------------------------------------------------------- group helpers


def _factorize(keys: ArrayLike) -> tuple[np.ndarray, pd.Index]:
    """Codes (-1 for missing) and sorted unique keys."""
    if not isinstance(keys, (pd.Series, pd.Index, np.ndarray)):
        keys = np.asarray(keys)
    values = keys.to_numpy() if isinstance(keys, (pd.Series, pd.Index)) else keys
    if values.dtype.kind in "iu" and len(values) > 1:
        # Already sorted integers (the fits keep their rows in series order): codes are the
        # run numbers, with no hashing; the same codes and keys as pd.factorize(sort=True).
        new = values[1:] != values[:-1]
        if (values[1:] >= values[:-1]).all():
            codes = np.concatenate([[0], np.cumsum(new)])
            uniques = values[np.concatenate([[True], new])]
            return codes, pd.Index(uniques, name=getattr(keys, "name", None))
    codes, uniques = pd.factorize(keys, sort=True)
    return codes, pd.Index(uniques, name=getattr(keys, "name", None))


def _prepare(
    series: ArrayLike, x: ArrayLike, y: ArrayLike
) -> tuple[np.ndarray, pd.Index, np.ndarray, np.ndarray, np.ndarray]:
    """Codes, keys, x and y of the usable rows (key present, x and y finite), and those rows."""
    codes, keys = _factorize(series)
    xa, ya = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if not len(codes) == len(xa) == len(ya):
        raise ValueError("series, x and y must have the same length")
    rows = np.flatnonzero((codes >= 0) & np.isfinite(xa) & np.isfinite(ya))
    return codes[rows], keys, xa[rows], ya[rows], rows


def _t_quantile(q: np.ndarray, df: np.ndarray) -> np.ndarray:
    """Student's t quantile: ``scipy.stats.t.ppf``'s own kernel, ``scipy.special.stdtrit``,
    without the distribution machinery (whose import is most of a command's start-up)."""
    with np.errstate(invalid="ignore"):
        out = np.asarray(special.stdtrit(df, q), dtype=float)
        out[(q == 0) & (df > 0)] = -np.inf  # stdtrit gives +inf there; t.ppf gives -inf
    return out


#: Whole degrees of freedom up to this many are looked up in a table by :func:`t_ppf`.
_T_TABLE_DF = 4096


def t_ppf(q: ArrayLike | float, df: ArrayLike | float) -> np.ndarray:
    """``scipy.stats.t.ppf`` elementwise, computed once per distinct (q, df) pair.

    The fleet has millions of readings but few distinct levels and degrees of freedom;
    scipy's quantile is slow per element, so this is the same values at a fraction of the
    cost.
    """
    q_arr, df_arr = np.broadcast_arrays(np.asarray(q, dtype=float), np.asarray(df, dtype=float))
    if q_arr.size < 64:
        return _t_quantile(q_arr, df_arr)
    flat_q, flat_df = q_arr.ravel(), df_arr.ravel()
    if flat_q[0] == flat_q[0] and (flat_q == flat_q[0]).all():
        # One level (step detection judges a fit group at one level) and mostly small
        # whole degrees of freedom (a fit's n - 2): a table of them, indexed; no hashing.
        small = (flat_df >= 0) & (flat_df <= _T_TABLE_DF) & (flat_df == np.trunc(flat_df))
        if small.any():
            out = np.empty(flat_q.size)
            whole = flat_df[small].astype(np.int64)
            levels = np.full(int(whole.max()) + 1, flat_q[0])
            out[small] = _t_quantile(levels, np.arange(levels.size, dtype=float))[whole]
            if not small.all():
                out[~small] = t_ppf(flat_q[~small], flat_df[~small])
            return out.reshape(q_arr.shape)
    q_codes, q_uniq = pd.factorize(flat_q, use_na_sentinel=False)
    df_codes, df_uniq = pd.factorize(flat_df, use_na_sentinel=False)
    pair_codes, pairs = pd.factorize(q_codes.astype(np.int64) * len(df_uniq) + df_codes)
    values = _t_quantile(np.asarray(q_uniq, dtype=float)[pairs // len(df_uniq)],
                         np.asarray(df_uniq, dtype=float)[pairs % len(df_uniq)])
    return values[pair_codes].reshape(q_arr.shape)


def _gsum(codes: np.ndarray, values: np.ndarray | None, n_groups: int) -> np.ndarray:
    return np.bincount(codes, weights=values, minlength=n_groups).astype(float)


def _group_max(codes: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    out = np.full(n_groups, -np.inf)
    if len(codes) and (codes[1:] >= codes[:-1]).all():
        # Rows in group order (as the fits keep them): one reduction per run, several
        # times faster than the unbuffered ufunc.at; the same maxima.
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
        with np.errstate(invalid="ignore"):  # NaN propagates, as through ufunc.at
            out[codes[starts]] = np.maximum.reduceat(values, starts)
    else:
        np.maximum.at(out, codes, values)
    return np.where(np.isfinite(out), out, np.nan)


# --------------------------------------------------------------------------- least squares


def _ols(codes: np.ndarray, x: np.ndarray, y: np.ndarray, n_groups: int) -> dict[str, np.ndarray]:
    n = _gsum(codes, None, n_groups)
    with np.errstate(divide="ignore", invalid="ignore"):
        x_mean = _gsum(codes, x, n_groups) / n
        y_mean = _gsum(codes, y, n_groups) / n
        # Corrected two-pass: add back the rounding error left in the first means.
        x_mean += _gsum(codes, x - x_mean[codes], n_groups) / n
        y_mean += _gsum(codes, y - y_mean[codes], n_groups) / n
        dx, dy = x - x_mean[codes], y - y_mean[codes]
        sxx = _gsum(codes, dx * dx, n_groups)
        syy = _gsum(codes, dy * dy, n_groups)
        slope = np.where(sxx > 0, _gsum(codes, dx * dy, n_groups) / sxx, np.nan)
        resid = dy - slope[codes] * dx
        sse = _gsum(codes, resid * resid, n_groups)
        resid_df = np.maximum(n - 2, 0)
        resid_sd = np.where(resid_df > 0, np.sqrt(sse / resid_df), np.nan)
        return {
            "n": n.astype(int), "x_mean": x_mean, "y_mean": y_mean, "sxx": sxx,
            "slope": slope, "intercept": y_mean - slope * x_mean,
            "resid_sd": resid_sd, "resid_df": resid_df.astype(int),
            "se_slope": resid_sd / np.sqrt(sxx),
            "se_intercept": resid_sd * np.sqrt(1 / n + x_mean**2 / sxx),
            "r_squared": np.where(syy > 0, 1 - sse / syy, np.nan), "sse": sse,
            "last_x": _group_max(codes, x, n_groups),
        }


def fit_ols(series: ArrayLike, x: ArrayLike, y: ArrayLike) -> pd.DataFrame:
    """Least-squares line y = intercept + slope*x for every series at once.

    Rows with a missing key or a non-finite x or y are ignored. resid_sd (s), se_slope and
    se_intercept are NaN for n < 3; slope is NaN when all x of a series are equal.

    :param series: series key per reading (integer, string or categorical).
    :param x: engine hours per reading.
    :param y: reading (normalised compression, kPa).
    :return: one row per series (index: sorted keys): n, x_mean, y_mean, sxx, slope,
        intercept, resid_sd, resid_df, se_slope, se_intercept, r_squared, sse, last_x.
    """
    codes, keys, xa, ya, _ = _prepare(series, x, y)
    return pd.DataFrame(_ols(codes, xa, ya, len(keys)), index=keys)


def fit_ols_through_origin(series: ArrayLike, x: ArrayLike, y: ArrayLike) -> pd.DataFrame:
    """Least-squares line through the origin, y = slope*x, per series (NIST NoInt models).

    :param series: series key per reading.
    :param x: predictor per reading.
    :param y: response per reading.
    :return: one row per series: n, slope, resid_sd (df = n - 1), se_slope and r_squared,
        the uncentred 1 - SSE/sum(y^2) that NIST uses for this model.
    """
    codes, keys, xa, ya, _ = _prepare(series, x, y)
    g = len(keys)
    n = _gsum(codes, None, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        sxx = _gsum(codes, xa * xa, g)
        slope = _gsum(codes, xa * ya, g) / sxx
        resid = ya - slope[codes] * xa
        sse = _gsum(codes, resid * resid, g)
        resid_sd = np.where(n > 1, np.sqrt(sse / (n - 1)), np.nan)
        return pd.DataFrame(
            {"n": n.astype(int), "slope": slope, "resid_sd": resid_sd,
             "se_slope": resid_sd / np.sqrt(sxx), "r_squared": 1 - sse / _gsum(codes, ya * ya, g)},
            index=keys,
        )


# --------------------------------------------------------------------------- Theil-Sen


_PAIR_BUDGET = 2_000_000  # pairwise slopes held at once: bounds Theil-Sen's memory


def _row_ties(sorted_rows: np.ndarray) -> np.ndarray:
    """Per row of a row-sorted matrix, the sum of t(t - 1)(2t + 5) over runs of t equal values."""
    m, k = sorted_rows.shape
    if k == 0:
        return np.zeros(m)
    new = np.ones((m, k), dtype=bool)
    new[:, 1:] = sorted_rows[:, 1:] != sorted_rows[:, :-1]
    t = np.bincount(np.cumsum(new.ravel()) - 1).astype(float)
    row_of_run = np.repeat(np.arange(m), new.sum(axis=1))
    return np.bincount(row_of_run, weights=t * (t - 1) * (2 * t + 5), minlength=m)


def _sorted_median(sorted_rows: np.ndarray) -> np.ndarray:
    """Per row of a row-sorted matrix, its median: ``np.median(rows, axis=1)`` (the same
    floats: the middle value, or the mean of the two middle values), without partitioning
    again."""
    size = sorted_rows.shape[1]
    return (sorted_rows[:, (size - 1) // 2] + sorted_rows[:, size // 2]) / 2


def _theil_sen_block(xm: np.ndarray, ym: np.ndarray, z: float) -> dict[str, np.ndarray]:
    """Theil-Sen for a block of series of equal length, one series per row."""
    m, size = xm.shape
    iu, ju = np.triu_indices(size, k=1)
    dx = xm.take(ju, axis=1) - xm.take(iu, axis=1)  # take: faster than fancy indexing
    with np.errstate(divide="ignore", invalid="ignore"):
        slopes = (ym.take(ju, axis=1) - ym.take(iu, axis=1)) / dx
    slopes[dx == 0] = np.nan
    slopes.sort(axis=1)  # NaN (pairs at one hour) go last
    valid = np.count_nonzero(dx != 0, axis=1)
    rows = np.arange(m)

    def at(rank: np.ndarray) -> np.ndarray:
        if not slopes.shape[1]:
            return np.full(m, np.nan)
        safe = np.clip(np.nan_to_num(rank, nan=0.0), 0, slopes.shape[1] - 1)
        return slopes[rows, safe.astype(int)]

    has = valid > 0
    median = np.where(has, (at((valid - 1) // 2) + at(valid // 2)) / 2, np.nan)
    # Each row sorted (the fits give x already in order), for the ties and the medians.
    xm_sorted = xm if size < 2 or (xm[:, 1:] >= xm[:, :-1]).all() else np.sort(xm, axis=1)
    ym_sorted = np.sort(ym, axis=1)
    var_s = (size * (size - 1) * (2 * size + 5) - _row_ties(xm_sorted)
             - _row_ties(ym_sorted)) / 18
    with np.errstate(invalid="ignore"):
        width = z * np.sqrt(var_s)
    ok = has & np.isfinite(width)
    low = np.where(ok, at(np.maximum(np.round((valid - width) / 2) - 1, 0)), np.nan)
    high = np.where(ok, at(np.minimum(np.round((valid + width) / 2), valid - 1)), np.nan)
    intercept = _sorted_median(ym_sorted) - median * _sorted_median(xm_sorted)
    return {"n_pairs": valid, "slope": median, "intercept": intercept, "low_slope": low,
            "high_slope": high}


def fit_theil_sen(
    series: ArrayLike, x: ArrayLike, y: ArrayLike, *, confidence: float = 0.95
) -> pd.DataFrame:
    """Theil-Sen slope and Sen's interval per series, as ``scipy.stats.theilslopes``.

    Slope: median of (y_j - y_i)/(x_j - x_i) over pairs with x_i != x_j; intercept
    ("separate"): median(y) - slope*median(x); interval: Sen (1968) eq. 2.6 with x- and y-tie
    corrections and scipy's rounding of the ranks. Series of equal length are handled
    together as the rows of a matrix, in blocks that bound the memory used.

    :param series: series key per reading.
    :param x: engine hours per reading.
    :param y: reading per reading.
    :param confidence: two-sided level of the slope interval.
    :return: one row per series: n, n_pairs, slope, intercept, low_slope, high_slope.
    """
    codes, keys, xa, ya, _ = _prepare(series, x, y)
    g = len(keys)
    order = np.argsort(codes, kind="stable")
    xs, ys = xa[order], ya[order]
    n = np.bincount(codes, minlength=g)
    starts = np.cumsum(n) - n
    out = {k: np.full(g, np.nan) for k in ("slope", "intercept", "low_slope", "high_slope")}
    out["n_pairs"] = np.zeros(g, dtype=int)
    z = special.ndtri(1 - (1 - confidence) / 2)
    for size in np.unique(n[n > 0]):
        groups = np.flatnonzero(n == size)
        per_block = max(1, _PAIR_BUDGET // max(size * (size - 1) // 2, 1))
        for first in range(0, len(groups), per_block):
            block = groups[first:first + per_block]
            idx = starts[block][:, None] + np.arange(size)
            for key, values in _theil_sen_block(xs[idx], ys[idx], z).items():
                out[key][block] = values
    return pd.DataFrame({"n": n.astype(int), "n_pairs": out["n_pairs"], "slope": out["slope"],
                         "intercept": out["intercept"], "low_slope": out["low_slope"],
                         "high_slope": out["high_slope"]}, index=keys)


# --------------------------------------------------------------------------- limit crossing


def crossing_hours(
    x_mean: ArrayLike, level: ArrayLike, slope: ArrayLike, slope_var: ArrayLike,
    resid_var: ArrayLike, n: ArrayLike, limit: ArrayLike, quantile: ArrayLike, k: float = 1.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Hours at which the lower and the upper band of a falling line meet a lower limit.

    Band: level + slope*d -/+ q*sqrt(resid_var*(k + 1/n) + slope_var*d^2), d = x - x_mean.
    Closed form (Fieller), with d* = (limit - level)/slope and g = q^2*slope_var/slope^2:
    x = x_mean + [d* -/+ (q/|slope|)*sqrt(slope_var*d*^2 + (1 - g)*resid_var*(k + 1/n))]/(1 - g);
    with slope_var = s^2/Sxx and resid_var = s^2 this is domain.md §6.2. NaN where slope >= 0
    or g >= 1 (slope not significant at that quantile: the band never closes).

    :param x_mean: hour the line is anchored at (the series' mean hour).
    :param level: fitted value at x_mean.
    :param slope: rate per hour, negative when wearing.
    :param slope_var: variance of the slope.
    :param resid_var: variance of one reading about the line (s^2).
    :param n: number of readings behind the level.
    :param limit: lower limit, unit of level.
    :param quantile: band quantile, e.g. t(0.95, n - 2) for a one-sided 95 % bound.
    :param k: 1 for one future reading, 0 for the mean trend, 1/m for a mean of m readings.
    :return: (early, late): where the lower and the upper band reach the limit.
    """
    x_mean, level, slope, slope_var, resid_var, n, limit, q = np.broadcast_arrays(
        *(np.asarray(a, dtype=float)
          for a in (x_mean, level, slope, slope_var, resid_var, n, limit, quantile)))
    with np.errstate(divide="ignore", invalid="ignore"):
        d_star = (limit - level) / slope
        g = q * q * slope_var / (slope * slope)
        spread = slope_var * d_star**2 + (1 - g) * resid_var * (k + 1 / n)
        half = (q / np.abs(slope)) * np.sqrt(spread)
        early = x_mean + (d_star - half) / (1 - g)
        late = x_mean + (d_star + half) / (1 - g)
    valid = (slope < 0) & (g < 1) & np.isfinite(early) & np.isfinite(late)
    return np.where(valid, early, np.nan), np.where(valid, late, np.nan)


def _projection(
    x_mean: np.ndarray, level: np.ndarray, slope: np.ndarray, slope_var: np.ndarray,
    resid_sd: np.ndarray, resid_df: np.ndarray, n: np.ndarray, limit: np.ndarray,
    confidence: float,
) -> dict[str, np.ndarray]:
    resid_df = np.asarray(resid_df, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        df = np.where(resid_df > 0, resid_df, np.nan)
        t_one = t_ppf(confidence, df)
        t_two = t_ppf(1 - (1 - confidence) / 2, df)
        common = (x_mean, level, slope, slope_var, np.asarray(resid_sd) ** 2, n, limit)
        planning, _ = crossing_hours(*common, t_one, k=1.0)
        pi_early, pi_late = crossing_hours(*common, t_two, k=1.0)
        mean_early, mean_late = crossing_hours(*common, t_two, k=0.0)
        significant = (slope < 0) & (t_one**2 * slope_var < slope**2)
        point = np.where(significant, x_mean + (limit - level) / slope, np.nan)
    return {"cross_point": point, "cross_planning": planning,
            "cross_pi_early": pi_early, "cross_pi_late": pi_late,
            "cross_mean_early": mean_early, "cross_mean_late": mean_late}


def project_crossings(
    fit: pd.DataFrame, limit: ArrayLike | float, *, confidence: float = 0.95
) -> pd.DataFrame:
    """Hours at which ``fit_ols`` lines and their bands reach a lower limit.

    :param fit: ``fit_ols`` result.
    :param limit: lower limit per row of ``fit`` or one value for all.
    :param confidence: band level, one-sided for cross_planning, two-sided for the others.
    :return: per series: cross_point (NaN unless the slope is significantly negative at the
        one-sided level), cross_planning (one-sided lower prediction bound, k = 1),
        cross_pi_early/late (two-sided prediction band, k = 1), cross_mean_early/late
        (two-sided band of the mean trend, k = 0).
    """
    limits = np.broadcast_to(np.asarray(limit, dtype=float), (len(fit),))
    columns = ("x_mean", "y_mean", "slope", "se_slope", "resid_sd", "resid_df", "n")
    x_mean, level, slope, se, resid_sd, resid_df, n = (fit[c].to_numpy(float) for c in columns)
    out = _projection(x_mean, level, slope, se**2, resid_sd, resid_df, n, limits, confidence)
    return pd.DataFrame(out, index=fit.index)


# --------------------------------------------------------------------------- pooling


def dersimonian_laird(group: ArrayLike, slope: ArrayLike, se: ArrayLike) -> pd.DataFrame:
    """DerSimonian-Laird random-effects summary of slopes per group (domain.md §6.4).

    Slopes whose SE is missing, infinite or zero carry no usable weight and are left out.

    :param group: group (engine family) key per slope.
    :param slope: slope per series.
    :param se: standard error per slope.
    :return: per group: k, mu_fe, q, tau2 (NaN when k < 2), mu_re, mu_re_se.
    """
    codes, keys = _factorize(group)
    b, s = np.asarray(slope, dtype=float), np.asarray(se, dtype=float)
    use = (codes >= 0) & np.isfinite(b) & np.isfinite(s) & (s > 0)
    c, b, s, g = codes[use], b[use], s[use], len(keys)
    w = 1 / s**2
    with np.errstate(divide="ignore", invalid="ignore"):
        k, sw = _gsum(c, None, g), _gsum(c, w, g)
        mu_fe = _gsum(c, w * b, g) / sw
        q = _gsum(c, w * (b - mu_fe[c]) ** 2, g)
        excess = (q - (k - 1)) / (sw - _gsum(c, w * w, g) / sw)
        tau2 = np.where(k >= 2, np.maximum(0.0, excess), np.nan)
        w_re = 1 / (s**2 + tau2[c])
        sw_re = _gsum(c, w_re, g)
        return pd.DataFrame(
            {"k": k.astype(int), "mu_fe": mu_fe, "q": q, "tau2": tau2,
             "mu_re": _gsum(c, w_re * b, g) / sw_re, "mu_re_se": np.sqrt(1 / sw_re)},
            index=keys,
        )


def shrink(
    slope: ArrayLike, se: ArrayLike, mu: ArrayLike, tau2: ArrayLike, mu_var: ArrayLike = 0.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Shrink slopes toward their family mean: B*b + (1 - B)*mu, B = tau^2/(tau^2 + se^2).

    Posterior variance B*se^2 + (1 - B)^2*mu_var (mu_var = 0: mu known, domain.md §6.4). A
    slope with no finite SE counts as no data: B = 0, mu with variance tau^2 + mu_var. Where
    tau2 is NaN (nothing to pool with) slope and SE are returned as given, with B = 1.

    :param slope: own slope per series.
    :param se: its standard error.
    :param mu: family mean slope.
    :param tau2: between-series variance of the family's slopes.
    :param mu_var: variance of the estimate of mu.
    :return: (shrunk slope, posterior SE, shrinkage factor B).
    """
    b, s, mu, tau2, mu_var = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (slope, se, mu, tau2, mu_var)))
    has_own = np.isfinite(b) & np.isfinite(s)
    with np.errstate(divide="ignore", invalid="ignore"):
        precision = np.where(has_own, 1 / s**2, 0.0)
        factor = np.where(np.isinf(precision), 1.0, tau2 * precision / (tau2 * precision + 1))
        factor = np.where(tau2 == 0, 0.0, factor)
        shrunk = np.where(has_own, factor * b, 0.0) + (1 - factor) * mu
        post_var = 1 / (precision + 1 / tau2) + (1 - factor) ** 2 * mu_var
    no_pool = np.isnan(tau2)
    return (np.where(no_pool, b, shrunk), np.where(no_pool, s, np.sqrt(post_var)),
            np.where(no_pool, 1.0, factor))


def pool_slopes(group: ArrayLike, slope: ArrayLike, se: ArrayLike) -> pd.DataFrame:
    """Partial pooling of series slopes within groups (DerSimonian-Laird, then shrinkage).

    :param group: group key per series.
    :param slope: own slope per series.
    :param se: its standard error (NaN when the series has no noise estimate).
    :return: per input row: family_mu (mu_RE), family_mu_se, family_tau2, shrinkage,
        pooled_slope, pooled_se and family_z = (slope - mu_RE)/sqrt(se^2 + tau^2).
    """
    summary = dersimonian_laird(group, slope, se)
    codes, _ = _factorize(group)
    picked = summary.reindex(summary.index[np.maximum(codes, 0)])
    mu, mu_se, tau2 = (np.where(codes >= 0, picked[c].to_numpy(float), np.nan)
                       for c in ("mu_re", "mu_re_se", "tau2"))
    b, s = np.asarray(slope, dtype=float), np.asarray(se, dtype=float)
    pooled, pooled_se, factor = shrink(b, s, mu, tau2, mu_se**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        family_z = (b - mu) / np.sqrt(s**2 + tau2)
    index = slope.index if isinstance(slope, pd.Series) else pd.RangeIndex(len(b))
    return pd.DataFrame(
        {"family_mu": mu, "family_mu_se": mu_se, "family_tau2": tau2, "shrinkage": factor,
         "pooled_slope": pooled, "pooled_se": pooled_se, "family_z": family_z},
        index=index,
    )


def pooled_residual_sd(group: ArrayLike, resid_sd: ArrayLike, resid_df: ArrayLike) -> pd.DataFrame:
    """Residual SD pooled over the fits of each group, weighted by degrees of freedom.

    :param group: group key per fit.
    :param resid_sd: residual SD per fit (NaN when it has no degrees of freedom).
    :param resid_df: residual degrees of freedom per fit.
    :return: per group: resid_sd = sqrt(sum df*s^2 / sum df) (NaN without df) and resid_df.
    """
    codes, keys = _factorize(group)
    s, df = np.asarray(resid_sd, dtype=float), np.asarray(resid_df, dtype=float)
    use = (codes >= 0) & np.isfinite(s) & (df > 0)
    total_df = _gsum(codes[use], df[use], len(keys))
    with np.errstate(divide="ignore", invalid="ignore"):
        pooled = np.sqrt(_gsum(codes[use], df[use] * s[use] ** 2, len(keys)) / total_df)
    return pd.DataFrame({"resid_sd": pooled, "resid_df": total_df.astype(int)}, index=keys)


# --------------------------------------------------------------------------- steps


def _judge_blocks(
    xs: np.ndarray, ys: np.ndarray, work: np.ndarray, block: np.ndarray,
    noise_sd: np.ndarray, noise_df: np.ndarray, t_level: np.ndarray, min_drop: np.ndarray,
) -> dict[str, np.ndarray]:
    """Judge each working reading against the OLS fit of the earlier readings of its block."""
    xc, yc = xs[work] - xs[block], ys[work] - ys[block]  # centred on the block's first reading
    parts = pd.DataFrame({"x": xc, "y": yc, "xx": xc * xc, "xy": xc * yc, "yy": yc * yc})
    before = parts.groupby(block, sort=False).cumsum().to_numpy() - parts.to_numpy()
    sx, sy, sxx, sxy, syy = before.T
    m = work - block
    with np.errstate(divide="ignore", invalid="ignore"):
        x_bar, y_bar = sx / m, sy / m
        sxx, sxy, syy = sxx - m * x_bar**2, sxy - m * x_bar * y_bar, syy - m * y_bar**2
        slope = sxy / sxx
        expected = y_bar + slope * (xc - x_bar)
        sse = np.maximum(syy - slope * sxy, 0.0)
        sd = np.where(m >= 3, np.sqrt(sse / (m - 2)), np.where(m == 2, noise_sd[work], np.nan))
        df = np.where(m >= 3, m - 2, np.where(m == 2, noise_df[work], np.nan))
        half = t_ppf(t_level[work], np.where(df > 0, df, np.nan)) * sd * np.sqrt(
            1 + 1 / m + (xc - x_bar) ** 2 / sxx)
    lower = expected - half
    judged = (m >= 2) & (sxx > 0) & np.isfinite(lower)
    # The tolerance keeps rounding noise on exactly collinear data from counting as a step.
    step = (judged & (yc < lower - 1e-9 * (np.abs(ys[work]) + 1.0))
            & (expected - yc >= min_drop[work]))
    return {"n_before": m, "judged": judged, "step": step,
            "expected": expected + ys[block], "lower_bound": lower + ys[block]}


#: Readings judged at once in step detection: bounds its memory on a large fleet.
_JUDGE_CHUNK = 400_000


def _judge_chunked(
    xs: np.ndarray, ys: np.ndarray, work: np.ndarray, block: np.ndarray, *rest: np.ndarray,
) -> dict[str, np.ndarray]:
    """:func:`_judge_blocks` a slice of whole blocks at a time (each block is judged alone,
    so the result is the same; only the memory held at once is smaller)."""
    if len(work) <= _JUDGE_CHUNK:
        return _judge_blocks(xs, ys, work, block, *rest)
    starts = np.flatnonzero(np.r_[True, block[1:] != block[:-1]])
    at = np.searchsorted(starts, np.arange(_JUDGE_CHUNK, len(work), _JUDGE_CHUNK))
    cuts = np.unique(starts[at[at < len(starts)]])
    edges = np.r_[0, cuts[cuts > 0], len(work)]
    parts = [_judge_blocks(xs, ys, work[a:b], block[a:b], *rest)
             for a, b in zip(edges[:-1], edges[1:], strict=True) if b > a]
    return {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}


def in_series_order(codes: np.ndarray, x: np.ndarray) -> bool:
    """Whether rows are sorted by series code (any integer key), then by x within each
    series (any ordered type: hours, times)."""
    if len(codes) < 2:
        return True
    dc = np.diff(codes)
    return bool((dc >= 0).all() and ((dc > 0) | (x[1:] >= x[:-1])).all())


def detect_steps(
    series: ArrayLike, x: ArrayLike, y: ArrayLike, *, noise_sd: ArrayLike | None = None,
    noise_df: ArrayLike | None = None, confidence: float | ArrayLike = 0.95,
    min_drop: float | ArrayLike = 0.0,
) -> pd.DataFrame:
    """Flag sudden drops: readings below the prediction band of their segment's earlier fit.

    Within each series ordered by x (ties by input order), a reading is a step when it lies
    below the lower bound of the two-sided ``confidence`` prediction interval (k = 1) of the
    OLS fit of the earlier readings of its segment; it then starts a new segment. The fit's
    own s needs >= 3 earlier readings; with exactly 2, ``noise_sd``/``noise_df`` are used (the
    family's pooled s); otherwise the reading is not judged. Runs in rounds, each finding the
    first step of every unsettled series at once and re-judging only after it.

    :param series: series key per reading.
    :param x: engine hours per reading.
    :param y: reading per reading.
    :param noise_sd: per reading, the noise SD for judging after 2 readings (None: not judged).
    :param noise_df: per reading, the degrees of freedom of ``noise_sd``.
    :param confidence: two-sided level of the prediction interval (D11: 0.95), one value or
        one per reading.
    :param min_drop: a step must also fall at least this far below the line (one value or
        one per reading): statistically and practically beyond the test noise.
    :return: per input row: segment (0, 1, ... within the series, -1 for unusable rows),
        step, judged, n_before (readings in the fit), expected, lower_bound and drop
        (expected - y, positive below the line).
    """
    codes, _, xa, ya, rows = _prepare(series, x, y)
    n_rows = len(np.asarray(y))
    sd_all = np.full(n_rows, np.nan) if noise_sd is None else np.asarray(noise_sd, dtype=float)
    df_all = np.full(n_rows, np.nan) if noise_df is None else np.asarray(noise_df, dtype=float)
    level_all = np.broadcast_to(np.asarray(confidence, dtype=float), (n_rows,))
    drop_all = np.broadcast_to(np.asarray(min_drop, dtype=float), (n_rows,))
    if in_series_order(codes, xa):  # rows are increasing: ties already in input order
        src, c, xs, ys = rows, codes, xa, ya
    else:
        order = np.lexsort((rows, xa, codes))
        src, c, xs, ys = rows[order], codes[order], xa[order], ya[order]
    sd_sorted, df_sorted = sd_all[src], df_all[src]
    t_sorted = 1 - (1 - level_all[src]) / 2
    drop_sorted = drop_all[src]
    n = len(c)
    positions = np.arange(n)
    first_of_series = np.r_[True, c[1:] != c[:-1]][:n]
    series_start = np.maximum.accumulate(np.where(first_of_series, positions, 0))
    seg_start = series_start.copy()
    found = {"n_before": np.full(n, -1), "judged": np.zeros(n, bool), "step": np.zeros(n, bool),
             "expected": np.full(n, np.nan), "lower_bound": np.full(n, np.nan)}
    done = np.zeros(n, bool)
    work = positions
    while work.size:
        block = seg_start[work]
        check = _judge_chunked(xs, ys, work, block, sd_sorted, df_sorted, t_sorted,
                               drop_sorted)
        flagged = work[check["step"]]
        blocks_hit, first = np.unique(block[check["step"]], return_index=True)
        cut = np.full(n, n)  # per block start: position of its first step (n: none)
        cut[blocks_hit] = flagged[first]
        work_cut = cut[block]
        settle = (work <= work_cut) & ~done[work]  # readings up to the step are final
        for key, values in check.items():
            found[key][work[settle]] = values[settle]
        done[work[settle]] = True
        moved = work >= work_cut  # the step reading and what follows form a new block
        seg_start[work[moved]] = work_cut[moved]
        work = work[moved]

    steps_so_far = np.cumsum(found["step"])
    found["segment"] = steps_so_far - steps_so_far[series_start]
    out = pd.DataFrame(index=series.index if isinstance(series, pd.Series)
                       else pd.RangeIndex(n_rows))
    for key, fill in (("segment", -1), ("step", False), ("judged", False), ("n_before", -1),
                      ("expected", np.nan), ("lower_bound", np.nan)):
        column = np.full(n_rows, fill, dtype=found[key].dtype)
        column[src] = found[key]
        out[key] = column
    out["drop"] = out["expected"].to_numpy() - np.asarray(y, dtype=float)
    return out


def detect_steps_again(
    without_noise: pd.DataFrame, series: ArrayLike, x: ArrayLike, y: ArrayLike, *,
    noise_sd: ArrayLike, noise_df: ArrayLike, confidence: float | ArrayLike = 0.95,
    min_drop: float | ArrayLike = 0.0,
) -> pd.DataFrame:
    """:func:`detect_steps` with ``noise_sd``/``noise_df``, given its result without them.

    The noise only judges a segment's third reading (two earlier readings, no own s), which
    a pass without it leaves unjudged. So only those readings are judged here; where none
    of a series' is a step, its segments stand and the result is the first pass's with
    those readings' judgement filled in. A series where one is a step is run again whole.
    The result is the same as ``detect_steps(series, x, y, noise_sd=..., ...)``.

    :param without_noise: ``detect_steps(series, x, y, confidence=..., min_drop=...)`` of
        the same rows (index as given there).
    :param noise_sd, noise_df, confidence, min_drop: as for :func:`detect_steps`.
    """
    out = without_noise.copy(deep=False)  # columns are replaced, never written into
    n_rows = len(out)
    codes, _, xa, ya, rows = _prepare(series, x, y)
    if in_series_order(codes, xa):
        src, c, xs, ys = rows, codes, xa, ya
    else:
        order = np.lexsort((rows, xa, codes))
        src, c, xs, ys = rows[order], codes[order], xa[order], ya[order]
    third = np.flatnonzero(out["n_before"].to_numpy()[src] == 2)  # sorted positions
    if third.size == 0:
        return out

    in_place = src.size == n_rows and bool((src == np.arange(n_rows)).all())

    def per_row(values: ArrayLike) -> np.ndarray:  # in sorted order (a view when it is)
        row_values = np.broadcast_to(np.asarray(values, dtype=float), (n_rows,))
        return row_values if in_place else row_values[src]

    # Each third reading with its segment's two earlier ones (never shared: a segment
    # starts at a step, which the first pass finds only at a reading judged on three).
    work = (third[:, None] + np.arange(-2, 1)).ravel()
    block = np.repeat(third - 2, 3)
    check = _judge_blocks(xs, ys, work, block, per_row(noise_sd), per_row(noise_df),
                          1 - (1 - per_row(confidence)) / 2, per_row(min_drop))
    last = np.arange(2, work.size, 3)
    stepped = check["step"][last]
    hit_series = np.unique(c[third[stepped]])
    keep = ~np.isin(c[third], hit_series)
    at = src[third[keep]]
    for key in ("judged", "step", "expected", "lower_bound"):
        column = out[key].to_numpy(copy=True)
        column[at] = check[key][last][keep]
        out[key] = column
    drop = out["drop"].to_numpy(copy=True)
    drop[at] = out["expected"].to_numpy()[at] - np.asarray(y, dtype=float)[at]
    out["drop"] = drop
    if hit_series.size:  # a new step: these series' later segments change, so run again
        redo = rows[np.isin(codes, hit_series)]  # in input order, as detect_steps breaks ties
        part = detect_steps(
            np.asarray(series)[redo], np.asarray(x, dtype=float)[redo],
            np.asarray(y, dtype=float)[redo], noise_sd=np.asarray(noise_sd, dtype=float)[redo],
            noise_df=np.asarray(noise_df, dtype=float)[redo],
            confidence=_pick(confidence, redo), min_drop=_pick(min_drop, redo))
        for key in part.columns:
            column = out[key].to_numpy(copy=True)
            column[redo] = part[key].to_numpy()
            out[key] = column
    return out


def _pick(values: float | ArrayLike, rows: np.ndarray) -> float | np.ndarray:
    """One value as it is, or the given rows of one value per row."""
    values = np.asarray(values, dtype=float)
    return float(values) if values.ndim == 0 else values[rows]
