"""The fleet trend engine: steps, fits, pooling and projections for every series at once.

The rules are in :mod:`fleetdb.trend`'s docstring. Two additions serve the one-unit refresh
after a test is logged: ``family_params`` (stored pooled statistics of each family, from
the last full refresh, used instead of recomputing a family from the few series given) and
``return_points`` (per-reading step flags, for the unit page and the sudden-drop reason).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

from fleetdb.trend import (
    FLEET_COLUMNS,
    SHORT_SERIES_N,
    THEIL_SEN_OUTLIER_SE,
    _factorize,
    _group_max,
    _ols,
    _projection,
    detect_steps,
    detect_steps_again,
    fit_theil_sen,
    in_series_order,
    pool_slopes,
    pooled_residual_sd,
    shrink,
    t_ppf,
)

#: Columns of a family-parameters frame (index: group key).
FAMILY_PARAM_COLUMNS = ["family_mu", "family_mu_se", "family_tau2", "family_noise_sd",
                        "family_noise_df", "n_series"]


def _stray_reading(
    codes: np.ndarray, x: np.ndarray, y: np.ndarray, fit: dict[str, np.ndarray], alpha: float,
) -> np.ndarray:
    """Per series: a reading fails the Bonferroni test on externally studentised residuals."""
    n, g = fit["n"].astype(float), len(fit["n"])
    with np.errstate(divide="ignore", invalid="ignore"):
        dx = x - fit["x_mean"][codes]
        resid = y - fit["y_mean"][codes] - fit["slope"][codes] * dx
        resid = np.where(np.abs(resid) > 1e-9 * (np.abs(y) + 1.0), resid, 0.0)  # rounding
        keep = 1 - 1 / n[codes] - dx**2 / fit["sxx"][codes]  # 1 - leverage
        s2 = np.maximum(fit["sse"][codes] - resid**2 / keep, 0.0) / (n[codes] - 3)
        t_abs = np.nan_to_num(np.abs(resid) / np.sqrt(s2 * keep), nan=0.0, posinf=np.inf)
        critical = t_ppf(1 - alpha / (2 * n), np.where(n > 3, n - 3, np.nan))
    return (n > 3) & (_group_max(codes, t_abs, g) > critical)



def _segment_noise(codes: np.ndarray, segment: np.ndarray, x: np.ndarray,
                   y: np.ndarray) -> tuple[np.ndarray, ...]:
    """Per segment of a series, in (series, segment) order: the series code, the segment,
    and the residual SD and df of its own OLS fit."""
    width = int(segment.max()) + 1
    seg_codes, seg_keys = _factorize(codes * width + segment)
    fits = _ols(seg_codes, x, y, len(seg_keys))
    keys = seg_keys.to_numpy()
    return keys // width, keys % width, fits["resid_sd"], fits["resid_df"]


def _segment_noise_again(before: tuple[np.ndarray, ...], codes: np.ndarray,
                         segment_before: np.ndarray, segment: np.ndarray, x: np.ndarray,
                         y: np.ndarray) -> tuple[np.ndarray, ...]:
    """:func:`_segment_noise` after some series' segments changed: only those series are
    fitted again (a segment's fit depends on its own rows alone); the same arrays, in the
    same order, as fitting every segment again."""
    changed = np.unique(codes[segment != segment_before])
    if changed.size == 0:
        return before
    rows = np.isin(codes, changed)
    new = _segment_noise(codes[rows], segment[rows], x[rows], y[rows])
    kept = ~np.isin(before[0], changed)
    merged = [np.concatenate([old[kept], fresh]) for old, fresh in zip(before, new, strict=True)]
    order = np.lexsort((merged[1], merged[0]))
    return tuple(column[order] for column in merged)


def _family_noise(
    per_segment: tuple[np.ndarray, ...], family_of_series: np.ndarray,
    external: pd.DataFrame | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Per series: its family's residual SD and df pooled over all segments with n >= 3
    (``per_segment``: :func:`_segment_noise`).

    ``external`` (index: family code) replaces the pooled values where it has them.
    """
    owner, _, resid_sd, resid_df = per_segment
    pooled = pooled_residual_sd(family_of_series[owner], resid_sd, resid_df)
    pooled = pooled.reindex(np.arange(family_of_series.max() + 1))
    if external is not None:
        has = external["family_noise_sd"].notna().to_numpy()
        pooled.loc[has, "resid_sd"] = external["family_noise_sd"].to_numpy()[has]
        pooled.loc[has, "resid_df"] = external["family_noise_df"].to_numpy()[has]
    return (pooled["resid_sd"].to_numpy(float)[family_of_series],
            pooled["resid_df"].to_numpy(float)[family_of_series])


def fit_fleet(
    readings: pd.DataFrame, *, series: str = "series", group: str = "family_id",
    x: str = "hours", y: str = "value", limit: str = "limit", confidence: float = 0.95,
    short_n: int = SHORT_SERIES_N, step_confidence: str | None = None,
    min_drop: str | None = None, family_params: pd.DataFrame | None = None,
    return_points: bool = False,
) -> pd.DataFrame | tuple[pd.DataFrame, pd.DataFrame]:
    """Fit every series of the fleet: steps, OLS, Theil-Sen, pooling, projected crossings.

    The rules are in the module docstring. Every row given is used: leave voided and
    artefact-flagged tests out of ``readings``.

    :param readings: one row per reading, with the columns named below.
    :param series: column of the series key (e.g. one cylinder of one unit).
    :param group: column of the pooling group (engine family), constant within a series.
    :param x: column of engine hours.
    :param y: column of the reading (compression, kPa).
    :param limit: column of the lower limit (kPa), constant within a series.
    :param confidence: level of intervals, projections and flags.
    :param short_n: below this many readings in the current segment, the pooled slope.
    :param step_confidence: column of a per-reading two-sided level for step detection
        (None: ``confidence``), e.g. Bonferroni over the cylinders of a test.
    :param min_drop: column of the least fall below the line that counts as a step.
    :param family_params: stored statistics per group (:func:`family_params`); groups found
        there are pooled with them instead of with the series given.
    :param return_points: also return the per-reading step judgement (``detect_steps``
        columns, index of ``readings``).
    :return: one row per series (index: series key) with ``FLEET_COLUMNS``: n (current
        segment), n_total, steps, last_step_x; ols_* (current segment), resid_sd/resid_df
        and noise_source (own, family, none); ts_* (Theil-Sen); pooled_slope, pooled_se,
        shrinkage, family_mu, family_tau2, family_z, faster_than_family, stray_reading; slope,
        slope_se and slope_source, and the crossing hours of ``project_crossings`` for them.
    """
    extra = [c for c in (step_confidence, min_drop) if c]
    data = readings[[series, group, x, y, limit, *extra]]
    usable = (data[series].notna() & np.isfinite(data[x]) & np.isfinite(data[y])).to_numpy()
    data = data[usable]
    position = np.flatnonzero(usable)  # of each row of data, in readings
    if data[group].isna().any():
        raise ValueError("every reading needs a group (engine family)")
    if data.empty:
        empty = pd.DataFrame(columns=FLEET_COLUMNS, index=pd.Index([], name=series))
        points = pd.DataFrame(columns=["segment", "step", "judged", "n_before", "expected",
                                       "lower_bound", "drop"], index=data.index)
        return (empty, points) if return_points else empty
    codes, keys = _factorize(data[series])
    # Work in (series, hours) order, ties in input order: the order step detection judges
    # in, so that its two passes and Theil-Sen find the rows already sorted.
    # Rows usually come in test order, where each series' hours already rise: a stable
    # sort by series alone is then the same order, several times faster than lexsort.
    hours = data[x].to_numpy(float)
    order = np.argsort(codes, kind="stable")
    if not in_series_order(codes[order], hours[order]):
        order = np.lexsort((hours, codes))
    del hours
    if not (order[1:] > order[:-1]).all():
        data, codes, position = data.iloc[order], codes[order], position[order]
    del order
    g = len(keys)
    xa, ya = data[x].to_numpy(float), data[y].to_numpy(float)
    step_level = data[step_confidence].to_numpy(float) if step_confidence else confidence
    step_drop = data[min_drop].to_numpy(float) if min_drop else 0.0
    # Rows are grouped by series now: each series' group and limit are its first row's,
    # and must be the same on every row of it (NaN limits count as equal).
    first_row = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
    group_values, limit_values = data[group].to_numpy(), data[limit].to_numpy(float)
    series_limit = limit_values[first_row][codes]
    if not ((group_values == group_values[first_row][codes]).all()
            and ((limit_values == series_limit)
                 | (np.isnan(limit_values) & np.isnan(series_limit))).all()):
        raise ValueError("group and limit must be constant within each series")
    per_series = pd.DataFrame({"family": group_values[first_row],
                               "limit": limit_values[first_row]})
    del group_values, limit_values, series_limit
    family, family_keys = _factorize(per_series["family"].to_numpy())
    external = None if family_params is None else family_params.reindex(family_keys).set_axis(
        np.arange(len(family_keys)))

    # Pass 1 judges with own noise only; its segments give the family noise for pass 2.
    first_pass = detect_steps(codes, xa, ya, confidence=step_level, min_drop=step_drop)
    first_segment = first_pass["segment"].to_numpy()
    per_segment = _segment_noise(codes, first_segment, xa, ya)
    noise_sd, noise_df = _family_noise(per_segment, family, external)
    steps = detect_steps_again(first_pass, codes, xa, ya, noise_sd=noise_sd[codes],
                               noise_df=noise_df[codes], confidence=step_level,
                               min_drop=step_drop)
    segment = steps["segment"].to_numpy()
    if not np.array_equal(segment, first_segment):
        per_segment = _segment_noise_again(per_segment, codes, first_segment, segment, xa, ya)
        noise_sd, noise_df = _family_noise(per_segment, family, external)
    del first_pass, first_segment, per_segment

    current = segment == _group_max(codes, segment, g)[codes]
    fit = _ols(codes[current], xa[current], ya[current], g)
    own = (fit["resid_df"] > 0) & np.isfinite(fit["resid_sd"])
    resid_sd = np.where(own, fit["resid_sd"], noise_sd)
    resid_df = np.where(own, fit["resid_df"], noise_df)
    with np.errstate(divide="ignore", invalid="ignore"):
        ols_se = resid_sd / np.sqrt(fit["sxx"])
    ts = fit_theil_sen(codes[current], xa[current], ya[current], confidence=confidence)
    ts = ts.reindex(np.arange(g))
    ts_slope, ts_intercept = ts["slope"].to_numpy(), ts["intercept"].to_numpy()
    pool = pool_slopes(family, fit["slope"], ols_se)
    if external is not None:
        pool = _pool_with(pool, external, family, fit["slope"], ols_se)
    # A short series' own s rests on one or two degrees of freedom and can be tiny by luck:
    # judge "faster than the family" with the larger of its own and the family-noise SE.
    with np.errstate(divide="ignore", invalid="ignore"):
        se_family = noise_sd / np.sqrt(fit["sxx"])
        se_guarded = np.where(fit["n"] < short_n, np.fmax(ols_se, se_family), ols_se)
        pool["family_z"] = (fit["slope"] - pool["family_mu"].to_numpy()) / np.sqrt(
            se_guarded**2 + pool["family_tau2"].to_numpy())
    faster = (pool["family_z"] < -special.ndtri(confidence)).to_numpy()

    short, has_ols = fit["n"] < short_n, np.isfinite(fit["slope"])
    has_pool = np.isfinite(pool["family_tau2"] + pool["pooled_slope"]).to_numpy()
    stray = _stray_reading(codes[current], xa[current], ya[current], fit, 1 - confidence)
    shifted = np.abs(ts_slope - fit["slope"]) > THEIL_SEN_OUTLIER_SE * ols_se
    outlier = ~short & has_ols & np.isfinite(ts_slope) & (stray | shifted)
    source = np.select(
        [short & has_ols & faster, short & has_pool, short & has_ols, outlier, has_ols],
        ["ols_faster_than_family", "pooled_short", "ols_no_family", "theil_sen_outlier", "ols"],
        default="none")
    use_pool, use_ts = source == "pooled_short", source == "theil_sen_outlier"
    slope = np.select([use_pool, use_ts], [pool["pooled_slope"], ts_slope], fit["slope"])
    slope_se = np.where(use_pool, pool["pooled_se"], ols_se)
    level = np.where(use_ts, ts_intercept + ts_slope * fit["x_mean"], fit["y_mean"])
    limits = per_series["limit"].to_numpy(float)
    projection = _projection(fit["x_mean"], level, slope, slope_se**2, resid_sd, resid_df,
                             fit["n"], limits, confidence)

    is_step = steps["step"].to_numpy()
    out = pd.DataFrame({
        "family": per_series["family"].to_numpy(), "n": fit["n"],
        "n_total": np.bincount(codes, minlength=g),
        "steps": np.bincount(codes[is_step], minlength=g),
        "last_step_x": _group_max(codes[is_step], xa[is_step], g), "last_x": fit["last_x"],
        "limit": limits, "ols_slope": fit["slope"], "ols_intercept": fit["intercept"],
        "ols_se": ols_se, "resid_sd": resid_sd, "resid_df": resid_df,
        "noise_source": np.where(own, "own", np.where(np.isfinite(noise_sd), "family", "none")),
        "ts_slope": ts_slope, "ts_intercept": ts_intercept,
        "ts_low": ts["low_slope"].to_numpy(), "ts_high": ts["high_slope"].to_numpy(),
        "faster_than_family": faster, "stray_reading": stray, "slope": slope,
        "slope_se": slope_se, "slope_source": source, **projection,
        "family_noise_sd": noise_sd, "family_noise_df": noise_df,
    }, index=keys)
    result = pd.concat([out, pool.set_axis(keys)], axis=1)[FLEET_COLUMNS]
    if not return_points:
        return result
    if len(position) < len(readings):  # rows left out: NaN in their place
        return result, steps.set_axis(data.index).reindex(readings.index)
    back = np.empty_like(position)
    back[position] = np.arange(len(position))
    return result, steps.take(back).set_axis(readings.index)


def _pool_with(pool: pd.DataFrame, external: pd.DataFrame, family: np.ndarray,
               slope: np.ndarray, se: np.ndarray) -> pd.DataFrame:
    """Re-pool the series of families found in ``external`` with its stored statistics."""
    ext = external.iloc[family].reset_index(drop=True)
    has = ext["family_tau2"].notna().to_numpy() & ext["family_mu"].notna().to_numpy()
    if not has.any():
        return pool
    mu, mu_se, tau2 = (ext[c].to_numpy(float) for c in ("family_mu", "family_mu_se",
                                                         "family_tau2"))
    shrunk, shrunk_se, factor = shrink(slope, se, mu, tau2, mu_se**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (slope - mu) / np.sqrt(se**2 + tau2)
    pool = pool.copy()
    for col, values in (("family_mu", mu), ("family_mu_se", mu_se), ("family_tau2", tau2),
                        ("shrinkage", factor), ("pooled_slope", shrunk),
                        ("pooled_se", shrunk_se), ("family_z", z)):
        pool[col] = np.where(has, values, pool[col].to_numpy(float))
    return pool


def family_params(fits: pd.DataFrame) -> pd.DataFrame:
    """The pooled statistics of each group in a :func:`fit_fleet` result, to store and reuse.

    :param fits: a fit_fleet result.
    :return: index group key; ``FAMILY_PARAM_COLUMNS``.
    """
    if fits.empty:
        return pd.DataFrame(columns=FAMILY_PARAM_COLUMNS)
    g = fits.groupby("family")
    out = g[["family_mu", "family_mu_se", "family_tau2", "family_noise_sd",
             "family_noise_df"]].first()
    out["n_series"] = g.size()
    return out[FAMILY_PARAM_COLUMNS]
