"""Trend engine against NIST StRD, scipy reference routines, root-finding and domain.md §9.

Sources named beside each check value: NIST StRD certified values (tests/fixtures/nist),
scipy 1.17.1 (stats.linregress, stats.theilslopes, optimize.brentq) and the check values of
domain.md §9 items 20-23, which that guide marks "computed" from published formulas (a).
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from fleetdb import fleetfit, trend

NIST = Path(__file__).parent / "fixtures" / "nist"
CERTIFIED = tomllib.loads((NIST / "certified.toml").read_text())
REL = 1e-10  # domain.md §9 item 18: assert NIST values to rel 1e-10

# domain.md §9 items 20 and 21: five annual tests, hours and psi (units do not matter here).
HOURS = np.array([0.0, 1000.0, 2000.0, 3000.0, 4000.0])
WEAR_PSI = np.array([165.0, 160.0, 156.0, 150.0, 146.0])
ARTEFACT_PSI = np.array([160.0, 158.0, 156.0, 154.0, 120.0])


def certified(name: str, key: str) -> float:
    return float(CERTIFIED[name][key])


def nist_data(name: str) -> pd.DataFrame:
    return pd.read_csv(NIST / f"{name}.csv", comment="#")


def random_fleet(seed: int, n_series: int, max_n: int, ties: bool = False) -> pd.DataFrame:
    """Invented wear series (test data only): falling lines with noise, uneven lengths."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, max_n + 1, n_series)
    key = np.repeat(rng.permutation(n_series) * 7 + 3, sizes)
    x = rng.uniform(0, 8000, sizes.sum())
    if ties:
        x = np.round(x / 1000) * 1000
    y = 1100 - rng.uniform(0, 0.04, n_series).repeat(sizes) * x + rng.normal(0, 8, len(x))
    if ties:
        y = np.round(y / 5) * 5
    shuffle = rng.permutation(len(x))
    return pd.DataFrame({"series": key[shuffle], "x": x[shuffle], "y": y[shuffle]})


# --------------------------------------------------------------------------- quantiles


@pytest.mark.parametrize("size", [8, 4_000])  # the direct path and the one-per-pair path
def test_t_quantiles_equal_scipy_stats(size: int) -> None:
    # Reference: scipy.stats.t.ppf and scipy.stats.norm.ppf (scipy 1.17.1), bit for bit,
    # edges included (q of 0 and 1, df of 0, negative, infinite or missing).
    rng = np.random.default_rng(5)
    q = rng.choice([0.0, 1e-9, 0.025, 0.5, 0.95, 0.975, 0.9999, 1.0, np.nan], size)
    df = rng.choice([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, 17.0, 1e6, np.inf, np.nan], size)
    np.testing.assert_array_equal(trend.t_ppf(q, df), stats.t.ppf(q, df))
    # One level for every row (the table of whole degrees of freedom), at each level.
    for level in (0.0, 0.025, 0.975, 0.999, 1.0):
        many = np.r_[df, rng.integers(0, 5000, size).astype(float)]
        np.testing.assert_array_equal(trend.t_ppf(np.full(many.size, level), many),
                                      stats.t.ppf(level, many))
    np.testing.assert_array_equal(trend._t_quantile(np.array(0.0), np.array(4.0)),
                                  stats.t.ppf(0.0, 4.0))
    p = np.array([0.0, 1e-9, 0.05, 0.5, 0.95, 1.0, np.nan])
    np.testing.assert_array_equal(trend.special.ndtri(p), stats.norm.ppf(p))


# --------------------------------------------------------------------------- OLS vs NIST


def test_norris_certified_values() -> None:
    # Source: NIST StRD Norris.dat certified values (domain.md §6.7, §9 item 18).
    data = nist_data("norris")
    fit = trend.fit_ols(np.zeros(len(data), int), data["x"], data["y"]).iloc[0]
    assert fit["slope"] == pytest.approx(certified("norris", "slope"), rel=REL)
    assert fit["intercept"] == pytest.approx(certified("norris", "intercept"), rel=REL)
    assert fit["se_slope"] == pytest.approx(certified("norris", "slope_sd"), rel=REL)
    assert fit["se_intercept"] == pytest.approx(certified("norris", "intercept_sd"), rel=REL)
    assert fit["resid_sd"] == pytest.approx(certified("norris", "residual_sd"), rel=REL)
    assert fit["r_squared"] == pytest.approx(certified("norris", "r_squared"), rel=REL)
    assert fit["sse"] == pytest.approx(certified("norris", "ss_residual"), rel=REL)
    assert fit["n"] == 36 and fit["resid_df"] == 34


def test_norris_inside_a_shuffled_fleet_keeps_its_certified_values() -> None:
    # Source: NIST StRD Norris.dat; the vectorised sums must not mix series.
    data = nist_data("norris")
    fleet = random_fleet(seed=5, n_series=40, max_n=12)
    keys = np.r_[np.full(len(data), -1), fleet["series"]]
    x, y = np.r_[data["x"], fleet["x"]], np.r_[data["y"], fleet["y"]]
    shuffle = np.random.default_rng(6).permutation(len(x))
    fit = trend.fit_ols(keys[shuffle], x[shuffle], y[shuffle]).loc[-1]
    assert fit["slope"] == pytest.approx(certified("norris", "slope"), rel=REL)
    assert fit["se_intercept"] == pytest.approx(certified("norris", "intercept_sd"), rel=REL)
    assert fit["resid_sd"] == pytest.approx(certified("norris", "residual_sd"), rel=REL)


@pytest.mark.parametrize("name", ["noint1", "noint2"])
def test_no_intercept_certified_values(name: str) -> None:
    # Source: NIST StRD NoInt1 / NoInt2 certified values (domain.md §6.7, §9 item 19).
    data = nist_data(name)
    fit = trend.fit_ols_through_origin(np.zeros(len(data), int), data["x"], data["y"]).iloc[0]
    assert fit["slope"] == pytest.approx(certified(name, "slope"), rel=REL)
    assert fit["se_slope"] == pytest.approx(certified(name, "slope_sd"), rel=REL)
    assert fit["resid_sd"] == pytest.approx(certified(name, "residual_sd"), rel=REL)
    assert fit["r_squared"] == pytest.approx(certified(name, "r_squared"), rel=REL)


def test_ols_matches_scipy_linregress_per_series() -> None:
    # Reference: scipy.stats.linregress, one call per series.
    fleet = random_fleet(seed=1, n_series=300, max_n=15)
    fits = trend.fit_ols(fleet["series"], fleet["x"], fleet["y"])
    for key, part in fleet.groupby("series"):
        fit = fits.loc[key]
        assert fit["n"] == len(part)
        if len(part) < 2:
            assert np.isnan(fit["slope"])
            continue
        ref = stats.linregress(part["x"], part["y"])
        assert fit["slope"] == pytest.approx(ref.slope, rel=1e-9)
        assert fit["intercept"] == pytest.approx(ref.intercept, rel=1e-9)
        if len(part) >= 3:
            assert fit["se_slope"] == pytest.approx(ref.stderr, rel=1e-9)
            assert fit["se_intercept"] == pytest.approx(ref.intercept_stderr, rel=1e-9)
            assert fit["r_squared"] == pytest.approx(ref.rvalue**2, rel=1e-9)
        else:
            assert np.isnan(fit["resid_sd"]) and np.isnan(fit["se_slope"])


def test_ols_ignores_unusable_rows_and_keeps_categorical_keys() -> None:
    keys = pd.Series(pd.Categorical(["b", "a", "b", "a", "b", "a", None]), name="cyl")
    x = [0.0, 0.0, 1.0, 1.0, 2.0, np.nan, 5.0]
    y = [10.0, 7.0, 8.0, 6.0, 6.0, 1.0, 1.0]
    fits = trend.fit_ols(keys, x, y)
    assert list(fits.index) == ["a", "b"] and fits.index.name == "cyl"
    assert fits.loc["a", "n"] == 2 and fits.loc["a", "slope"] == pytest.approx(-1.0)
    assert fits.loc["b", "slope"] == pytest.approx(-2.0) and fits.loc["b", "resid_sd"] == 0.0


# --------------------------------------------------------------------------- Theil-Sen


def test_theil_sen_check_values_with_an_artefact() -> None:
    # Source: domain.md §9 item 21 (computed with scipy; method (a) Sen 1968).
    fit = trend.fit_theil_sen(np.zeros(5, int), HOURS, ARTEFACT_PSI).iloc[0]
    assert fit["slope"] == -0.002  # exactly
    assert fit["intercept"] == pytest.approx(160.0, rel=1e-12)
    assert fit["low_slope"] == pytest.approx(-0.034, rel=1e-12)
    assert fit["high_slope"] == pytest.approx(-0.002, rel=1e-12)
    assert fit["n_pairs"] == 10
    # Same source: OLS on these data gives -0.0084.
    ols = trend.fit_ols(np.zeros(5, int), HOURS, ARTEFACT_PSI).iloc[0]
    assert ols["slope"] == pytest.approx(-0.0084, rel=1e-12)


@pytest.mark.parametrize(("ties", "max_n"), [(False, 15), (True, 15), (True, 45)])
def test_theil_sen_matches_scipy_theilslopes(ties: bool, max_n: int) -> None:
    # Reference: scipy.stats.theilslopes (method 'separate', tie-corrected Sen interval).
    fleet = random_fleet(seed=2 + max_n, n_series=120, max_n=max_n, ties=ties)
    fits = trend.fit_theil_sen(fleet["series"], fleet["x"], fleet["y"], confidence=0.9)
    for key, part in fleet.groupby("series"):
        fit = fits.loc[key]
        if len(part) < 2 or part["x"].nunique() < 2:
            assert np.isnan(fit["slope"])
            continue
        ref = stats.theilslopes(part["y"], part["x"], alpha=0.9)
        assert fit["slope"] == pytest.approx(ref.slope, rel=1e-12, abs=1e-15)
        assert fit["intercept"] == pytest.approx(ref.intercept, rel=1e-12, abs=1e-12)
        assert fit["low_slope"] == pytest.approx(ref.low_slope, rel=1e-12, abs=1e-15, nan_ok=True)
        assert fit["high_slope"] == pytest.approx(ref.high_slope, rel=1e-12, abs=1e-15, nan_ok=True)


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 12), st.integers(1, 6), st.integers(0, 2**32 - 1))
def test_theil_sen_in_order_rows_and_their_medians_as_numpy(size: int, rows: int,
                                                             seed: int) -> None:
    # Reference: numpy.median, and the same block fitted from rows not in x order.
    rng = np.random.default_rng(seed)
    xm = np.sort(rng.integers(0, 5, (rows, size)).astype(float) * 250.5, axis=1)
    ym = rng.integers(0, 4, (rows, size)).astype(float) * 0.1 + 900
    assert np.array_equal(trend._sorted_median(np.sort(ym, axis=1)), np.median(ym, axis=1))
    shuffle = rng.permutation(size)
    in_order = trend._theil_sen_block(xm, ym, 1.96)
    shuffled = trend._theil_sen_block(xm[:, shuffle], ym[:, shuffle], 1.96)
    for key, values in in_order.items():
        assert np.array_equal(values, shuffled[key], equal_nan=True), key


# --------------------------------------------------------------------------- crossing


def test_crossing_check_values() -> None:
    # Source: domain.md §9 item 20 (computed; formulas (a) Fieller 1954, Montgomery eq. 2.45).
    fit = trend.fit_ols(np.zeros(5, int), HOURS, WEAR_PSI)
    row = fit.iloc[0]
    assert row["slope"] == pytest.approx(-0.0048, rel=1e-12)
    assert row["intercept"] == pytest.approx(165.0, rel=1e-12)
    assert row["resid_sd"] == pytest.approx(0.51639778, rel=1e-8)
    assert row["se_slope"] == pytest.approx(1.632993e-4, rel=1e-6)
    cross = trend.project_crossings(fit, 120.0).iloc[0]
    assert cross["cross_point"] == pytest.approx(9375.0, rel=1e-12)
    assert cross["cross_pi_early"] == pytest.approx(8570.78, abs=0.005)
    assert cross["cross_planning"] == pytest.approx(8766.39, abs=0.005)
    assert cross["cross_mean_early"] == pytest.approx(8639.97, abs=0.005)


def _band(row: pd.Series, limit: float, q: float, k: float, sign: float) -> callable:
    def distance(hours: float) -> float:
        d = hours - row["x_mean"]
        spread = row["resid_sd"] * np.sqrt(k + 1 / row["n"] + d * d / row["sxx"])
        return row["y_mean"] + row["slope"] * d + sign * q * spread - limit
    return distance


def _root(f: callable, start: float, direction: float) -> float:
    step = 1000.0
    while np.sign(f(start + direction * step)) == np.sign(f(start)):
        step *= 2
    a, b = sorted((start, start + direction * step))
    return optimize.brentq(f, a, b, xtol=1e-12, rtol=1e-15)


def test_crossing_closed_form_equals_brentq_root() -> None:
    # Reference: scipy.optimize.brentq on the band equation (domain.md §6.2: "closed form
    # agrees with numerical root-finding to 1e-9").
    fleet = random_fleet(seed=3, n_series=60, max_n=12)
    fits = trend.fit_ols(fleet["series"], fleet["x"], fleet["y"])
    limits = fits["y_mean"] - np.random.default_rng(4).uniform(20, 200, len(fits))
    cross = trend.project_crossings(fits, limits.to_numpy())
    checked = 0
    for key, row in fits.iterrows():
        limit = limits[key]
        if row["n"] < 3:
            continue
        df = row["n"] - 2
        for column, q, k, sign in (("cross_planning", stats.t.ppf(0.95, df), 1, -1),
                                   ("cross_pi_early", stats.t.ppf(0.975, df), 1, -1),
                                   ("cross_pi_late", stats.t.ppf(0.975, df), 1, +1),
                                   ("cross_mean_early", stats.t.ppf(0.975, df), 0, -1),
                                   ("cross_mean_late", stats.t.ppf(0.975, df), 0, +1)):
            value = cross.loc[key, column]
            significant = row["slope"] < 0 and abs(row["slope"] / row["se_slope"]) > q
            assert np.isfinite(value) == significant, (key, column)
            if significant:
                point = (limit - row["intercept"]) / row["slope"]
                root = _root(_band(row, limit, q, k, sign), point, sign)
                assert value == pytest.approx(root, rel=1e-9)
                checked += 1
    assert checked > 50


def test_no_projected_crossing_when_rising_or_flat() -> None:
    # domain.md D12: "no projected crossing" when b1 >= 0 or the slope is not significant.
    keys = np.repeat([0, 1, 2], 5)
    y = np.r_[WEAR_PSI[::-1], [150, 152, 149, 151, 150], WEAR_PSI]
    fits = trend.fit_ols(keys, np.tile(HOURS, 3), y)
    cross = trend.project_crossings(fits, 120.0)
    assert cross.loc[[0, 1]].isna().all().all()
    assert cross.loc[2].notna().all()


# --------------------------------------------------------------------------- pooling


def test_shrinkage_with_known_hyper_parameters() -> None:
    # Source: domain.md §9 item 22 (computed; formula (a) Efron & Morris 1975).
    shrunk, post_se, factor = trend.shrink(-0.011, 0.002, -0.005, 0.001**2)
    assert factor == pytest.approx(0.2, rel=1e-12)
    assert shrunk == pytest.approx(-0.0062, rel=1e-12)
    assert post_se == pytest.approx(np.sqrt(0.2 * 0.002**2), rel=1e-12)  # B*s^2, mu known


def test_dersimonian_laird_check_values() -> None:
    # Source: domain.md §9 item 23 (computed; method (a) DerSimonian & Laird 1986).
    slopes = [-0.004, -0.006, -0.005, -0.013]
    ses = [0.001, 0.001, 0.001, 0.004]
    summary = trend.dersimonian_laird(["f"] * 4, slopes, ses).loc["f"]
    assert summary["mu_fe"] == pytest.approx(-0.00516327, rel=1e-6)
    assert summary["q"] == pytest.approx(5.91837, rel=1e-6)
    assert summary["tau2"] == pytest.approx(1.40196e-6, rel=1e-5)
    assert summary["mu_re"] == pytest.approx(-0.00535189, rel=1e-6)
    pooled = trend.pool_slopes(["f"] * 4, slopes, ses)
    expected = [-0.004563, -0.005730, -0.005147, -0.005968]
    # The guide prints 6 decimals; its third value is -0.0051464991 rounded twice (via
    # -0.0051465), so the tolerance is one unit of the last printed digit, not half.
    np.testing.assert_allclose(pooled["pooled_slope"], expected, rtol=0, atol=1e-6)


def test_pooling_is_vectorised_over_families() -> None:
    # Each family pooled alone (domain.md §6.4 formulas) equals all families in one call.
    rng = np.random.default_rng(8)
    family = rng.integers(0, 12, 200)
    slope = rng.normal(-0.02, 0.005, 200)
    se = rng.uniform(0.001, 0.01, 200)
    se[rng.random(200) < 0.05] = np.nan  # series without a noise estimate
    together = trend.pool_slopes(family, slope, se)
    for fam in np.unique(family):
        part = family == fam
        alone = trend.pool_slopes(np.zeros(part.sum()), slope[part], se[part])
        np.testing.assert_allclose(together[part].to_numpy(), alone.to_numpy(), rtol=1e-12)
    no_own = np.isnan(se)
    np.testing.assert_allclose(together["pooled_slope"][no_own], together["family_mu"][no_own])


def test_no_pooling_for_a_family_of_one() -> None:
    pooled = trend.pool_slopes(["a", "b", "b"], [-0.03, -0.02, -0.01], [0.01, 0.002, 0.002])
    assert np.isnan(pooled.loc[0, "family_tau2"])
    assert pooled.loc[0, "pooled_slope"] == -0.03 and pooled.loc[0, "shrinkage"] == 1.0


def test_pooled_residual_sd_weights_by_degrees_of_freedom() -> None:
    pooled = trend.pooled_residual_sd(["a", "a", "a"], [1.0, 2.0, np.nan], [1, 3, 0]).loc["a"]
    assert pooled["resid_sd"] == pytest.approx(np.sqrt((1 * 1 + 3 * 4) / 4))
    assert pooled["resid_df"] == 4


# --------------------------------------------------------------------------- steps


def reference_steps(x: np.ndarray, y: np.ndarray, noise_sd: float = np.nan,
                    noise_df: float = np.nan) -> tuple[list[int], list[bool]]:
    """Per-series loop over readings with scipy.stats.linregress (domain.md D11, §6.1 PI)."""
    order = np.argsort(x, kind="stable")
    segment, start = 0, 0
    segments, steps = [0] * len(x), [False] * len(x)
    for pos, row in enumerate(order):
        earlier = order[start:pos]
        m = len(earlier)
        step = False
        if m >= 2 and np.ptp(x[earlier]) > 0:
            fit = stats.linregress(x[earlier], y[earlier])
            if m >= 3:
                resid = y[earlier] - fit.intercept - fit.slope * x[earlier]
                sd, df = np.sqrt(resid @ resid / (m - 2)), m - 2
            else:
                sd, df = noise_sd, noise_df
            if np.isfinite(sd) and df > 0:
                x_bar = x[earlier].mean()
                sxx = ((x[earlier] - x_bar) ** 2).sum()
                spread = np.sqrt(1 + 1 / m + (x[row] - x_bar) ** 2 / sxx)
                lower = fit.intercept + fit.slope * x[row] - stats.t.ppf(0.975, df) * sd * spread
                step = y[row] < lower - 1e-9 * (abs(y[row]) + 1)
        if step:
            segment, start = segment + 1, pos
        segments[row], steps[row] = segment, bool(step)
    return segments, steps


def test_step_is_found_and_restarts_the_segment() -> None:
    # A 60 kPa drop after five clean readings (invented data); band per Montgomery eq. 2.45.
    x = np.arange(9) * 1000.0
    y = np.array([1100, 1085, 1072, 1055, 1041, 965, 950, 938, 921.0])
    found = trend.detect_steps(np.zeros(9, int), x, y)
    assert found["step"].tolist() == [False] * 5 + [True] + [False] * 3
    assert found["segment"].tolist() == [0] * 5 + [1] * 4
    fit = stats.linregress(x[:5], y[:5])
    resid = y[:5] - fit.intercept - fit.slope * x[:5]
    s = np.sqrt(resid @ resid / 3)
    half = stats.t.ppf(0.975, 3) * s * np.sqrt(1 + 1 / 5 + (5000 - 2000) ** 2 / 1e7)
    expected = fit.intercept + fit.slope * 5000
    assert found.loc[5, "expected"] == pytest.approx(expected, rel=1e-12)
    assert found.loc[5, "lower_bound"] == pytest.approx(expected - half, rel=1e-12)
    assert found.loc[5, "drop"] == pytest.approx(expected - 965, rel=1e-12)
    assert found["n_before"].tolist() == [0, 1, 2, 3, 4, 5, 1, 2, 3]
    assert found["judged"].tolist() == [False] * 3 + [True] * 3 + [False] * 2 + [True]


def test_step_after_two_readings_needs_the_family_noise() -> None:
    x, y = np.array([0.0, 1000.0, 2000.0]), np.array([1100.0, 1090.0, 1040.0])
    assert not trend.detect_steps([1, 1, 1], x, y)["step"].any()
    with_noise = trend.detect_steps([1, 1, 1], x, y, noise_sd=[5.0] * 3, noise_df=[20] * 3)
    assert with_noise["step"].tolist() == [False, False, True]
    half = stats.t.ppf(0.975, 20) * 5.0 * np.sqrt(1 + 1 / 2 + 1500.0**2 / 5e5)
    assert with_noise.loc[2, "lower_bound"] == pytest.approx(1080.0 - half, rel=1e-12)


def test_steps_match_the_reference_loop_on_a_fleet() -> None:
    fleet = random_fleet(seed=9, n_series=150, max_n=14)
    rng = np.random.default_rng(10)
    drops = rng.random(len(fleet)) < 0.08
    fleet.loc[drops, "y"] -= 70  # invented sudden drops
    family_noise = pd.Series(rng.uniform(4, 12, 150 * 7 + 3))  # per series key
    noise = family_noise[fleet["series"]].to_numpy()
    found = trend.detect_steps(fleet["series"], fleet["x"], fleet["y"],
                               noise_sd=noise, noise_df=np.full(len(fleet), 30))
    assert found["step"].sum() > 10
    for key, part in fleet.groupby("series"):
        segments, steps = reference_steps(part["x"].to_numpy(), part["y"].to_numpy(),
                                          family_noise[key], 30)
        assert found.loc[part.index, "step"].tolist() == steps
        assert found.loc[part.index, "segment"].tolist() == segments


# --------------------------------------------------------------------------- engine


def engine_fleet() -> pd.DataFrame:
    """Invented family of wear series for the engine's slope-source rules (test data only)."""
    rng = np.random.default_rng(11)
    rows = []
    hours = np.arange(8) * 1000.0
    wiggle = 4.0 * (-1.0) ** np.arange(8)  # even scatter: no reading stands out
    for unit in range(10):  # long clean series, family slope about -0.02 kPa/h
        y = 1100 - rng.normal(0.02, 0.002) * hours + wiggle
        rows += [(f"u{unit}", "A", h, v) for h, v in zip(hours, y, strict=True)]
    y = 1100 - 0.02 * hours + rng.normal(0, 4, 8)
    y[7] += 60  # one stray high reading at the end pulls OLS: Theil-Sen takes over
    rows += [("stray", "A", h, v) for h, v in zip(hours, y, strict=True)]
    rows += [("short", "A", h, 1100 - 0.021 * h + e) for h, e in zip(hours[:3], [2, -3, 1],
                                                                       strict=True)]
    rows += [("fast", "A", h, 1100 - 0.09 * h) for h in hours[:4]]
    rows += [("alone", "B", h, 900 - 0.03 * h + e) for h, e in zip(hours[:4], [1, -1, 0, 2],
                                                                     strict=True)]
    out = pd.DataFrame(rows, columns=["series", "family_id", "hours", "value"])
    return out.assign(limit=np.where(out["family_id"] == "A", 900.0, 700.0))


def test_engine_slope_sources() -> None:
    # Rules chosen here (b), documented in fleetdb/trend.py; invented data.
    result = fleetfit.fit_fleet(engine_fleet())
    assert list(result.columns) == trend.FLEET_COLUMNS
    assert (result.loc[[f"u{i}" for i in range(10)], "slope_source"] == "ols").all()
    assert result.loc["stray", "slope_source"] == "theil_sen_outlier"
    assert result.loc["stray", "stray_reading"]
    assert not result.loc[[f"u{i}" for i in range(10)], "stray_reading"].any()
    assert result.loc["short", "slope_source"] == "pooled_short"
    assert result.loc["fast", "slope_source"] == "ols_faster_than_family"
    assert result.loc["fast", "faster_than_family"]
    assert result.loc["alone", "slope_source"] == "ols_no_family"
    assert result.loc["stray", "slope"] == result.loc["stray", "ts_slope"]
    assert result.loc["short", "slope"] == result.loc["short", "pooled_slope"]
    assert result["steps"].sum() == 0


def test_engine_uses_theil_sen_for_a_stray_reading() -> None:
    # domain.md §9 item 21 (computed): the stray inflates SE(OLS) with the shift, so
    # |TS - OLS|/SE(OLS) is exactly sqrt(3) and a 2-SE rule alone cannot fire.
    ols = stats.linregress(HOURS, ARTEFACT_PSI)
    assert abs(-0.002 - ols.slope) / ols.stderr == pytest.approx(np.sqrt(3), rel=1e-12)
    # There the stray is the last, low reading, which the engine treats as a step. The same
    # stray as a high first reading (+34, never a step) is caught by the Bonferroni outlier
    # test (Montgomery, Peck & Vining ch. 4); the rule itself is chosen here (b).
    stray_first = np.array([194.0, 158.0, 156.0, 154.0, 152.0])
    readings = pd.DataFrame({"series": 1, "family_id": 1, "hours": HOURS,
                             "value": stray_first, "limit": 100.0})
    row = fleetfit.fit_fleet(readings).loc[1]
    assert row["steps"] == 0 and row["stray_reading"]
    assert row["slope_source"] == "theil_sen_outlier" and row["slope"] == -0.002
    assert abs(row["ts_slope"] - row["ols_slope"]) < 2 * row["ols_se"]
    # Projected with the OLS variance the stray inflates: not significant, no crossing.
    assert np.isnan(row["cross_point"]) and np.isnan(row["cross_planning"])


def test_engine_ols_projection_equals_project_crossings() -> None:
    readings = engine_fleet()
    result = fleetfit.fit_fleet(readings)
    part = readings[readings["series"] == "u3"]
    fit = trend.fit_ols(part["series"], part["hours"], part["value"])
    cross = trend.project_crossings(fit, 900.0).iloc[0]
    assert result.loc["u3", "cross_point"] == pytest.approx(cross["cross_point"], rel=1e-12)
    assert result.loc["u3", "cross_planning"] == pytest.approx(cross["cross_planning"], rel=1e-12)


def test_engine_pooled_projection_equals_brentq_root() -> None:
    # Reference: scipy.optimize.brentq on the one-sided band with the pooled slope variance.
    readings = engine_fleet()
    row = fleetfit.fit_fleet(readings).loc["short"]
    part = readings[readings["series"] == "short"]
    x_bar, y_bar = part["hours"].mean(), part["value"].mean()
    q = stats.t.ppf(0.95, row["resid_df"])

    def lower_band(hours: float) -> float:
        d = hours - x_bar
        var = row["resid_sd"] ** 2 * (1 + 1 / 3) + row["slope_se"] ** 2 * d * d
        return y_bar + row["slope"] * d - q * np.sqrt(var) - 900.0

    root = _root(lower_band, x_bar + (900.0 - y_bar) / row["slope"], -1)
    assert row["cross_planning"] == pytest.approx(root, rel=1e-9)
    assert row["cross_planning"] < row["cross_point"]


def test_engine_restarts_the_fit_after_a_step() -> None:
    readings = engine_fleet()
    drop = (readings["series"] == "u0") & (readings["hours"] >= 5000)
    readings.loc[drop, "value"] -= 90
    row = fleetfit.fit_fleet(readings).loc["u0"]
    assert row["steps"] == 1 and row["last_step_x"] == 5000.0
    assert row["n"] == 3 and row["n_total"] == 8
    assert row["slope_source"] in ("pooled_short", "ols_faster_than_family")


def test_engine_rejects_a_series_in_two_families() -> None:
    readings = engine_fleet()
    readings.loc[0, "family_id"] = "B"
    with pytest.raises(ValueError, match="constant"):
        fleetfit.fit_fleet(readings)


# --------------------------------------------------------------------------- properties

series_strategy = st.lists(
    st.tuples(st.integers(0, 5), st.integers(0, 40), st.integers(8000, 11000)),
    min_size=1, max_size=60,
)


def as_arrays(rows: list[tuple[int, int, int]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    keys, x, y = (np.array(column) for column in zip(*rows, strict=True))
    return keys, x * 250.0, y / 10.0  # hours on a 250 h grid, readings to 0.1 kPa


@settings(max_examples=60, deadline=None)
@given(series_strategy, st.integers(0, 40))
def test_point_on_the_fitted_line_leaves_the_slope(rows: list, new_x: int) -> None:
    keys, x, y = as_arrays(rows)
    fits = trend.fit_ols(keys, x, y)
    fit = fits.iloc[0]
    if not np.isfinite(fit["slope"]):
        return
    key, hours = fits.index[0], new_x * 250.0
    refit = trend.fit_ols(np.r_[keys, key], np.r_[x, hours],
                          np.r_[y, fit["intercept"] + fit["slope"] * hours]).iloc[0]
    assert refit["slope"] == pytest.approx(fit["slope"], rel=1e-7, abs=1e-12)
    assert refit["intercept"] == pytest.approx(fit["intercept"], rel=1e-9)


@settings(max_examples=60, deadline=None)
@given(series_strategy, st.randoms(use_true_random=False))
def test_results_do_not_depend_on_row_order_or_key_labels(rows: list, rnd) -> None:
    keys, x, y = as_arrays(rows)
    shuffle = np.array(rnd.sample(range(len(x)), len(x)))
    relabel = {k: f"s{v}" for k, v in zip(range(6), rnd.sample(range(6), 6), strict=True)}
    new_keys = np.array([relabel[k] for k in keys[shuffle]])
    for fitter in (trend.fit_ols, trend.fit_theil_sen):
        before = fitter(keys, x, y)
        after = fitter(new_keys, x[shuffle], y[shuffle])
        after = after.loc[[relabel[k] for k in before.index]]
        np.testing.assert_allclose(after.to_numpy(float), before.to_numpy(float),
                                   rtol=1e-9, atol=1e-9)


@pytest.mark.filterwarnings("ignore:invalid value encountered in sqrt:RuntimeWarning")
@settings(max_examples=60, deadline=None)
@given(series_strategy, st.floats(0.5, 20.0))
def test_vectorised_results_equal_a_per_series_loop(rows: list, noise: float) -> None:
    keys, x, y = as_arrays(rows)
    fits = trend.fit_ols(keys, x, y)
    sen = trend.fit_theil_sen(keys, x, y)
    steps = trend.detect_steps(keys, x, y, noise_sd=np.full(len(x), noise),
                               noise_df=np.full(len(x), 12))
    for key in fits.index:
        part = keys == key
        alone = trend.fit_ols(np.zeros(part.sum()), x[part], y[part]).iloc[0]
        np.testing.assert_allclose(fits.loc[key].to_numpy(float), alone.to_numpy(float),
                                   rtol=1e-9, atol=1e-9)
        if np.ptp(x[part]) > 0:
            ref = stats.theilslopes(y[part], x[part])
            assert sen.loc[key, "slope"] == pytest.approx(ref.slope, rel=1e-12, abs=1e-15)
            low = pytest.approx(ref.low_slope, rel=1e-12, abs=1e-15, nan_ok=True)
            assert sen.loc[key, "low_slope"] == low
        segments, flagged = reference_steps(x[part], y[part], noise, 12)
        assert steps["step"][part].tolist() == flagged
        assert steps["segment"][part].tolist() == segments


def _both_ways(keys: np.ndarray, x: np.ndarray, y: np.ndarray, noise: np.ndarray,
               level: np.ndarray | float, drop: np.ndarray | float) -> tuple:
    """detect_steps with the noise in one pass, and the two-step way fit_fleet takes."""
    df = np.full(len(x), 12.0)
    direct = trend.detect_steps(keys, x, y, noise_sd=noise, noise_df=df, confidence=level,
                                min_drop=drop)
    first = trend.detect_steps(keys, x, y, confidence=level, min_drop=drop)
    again = trend.detect_steps_again(first, keys, x, y, noise_sd=noise, noise_df=df,
                                     confidence=level, min_drop=drop)
    return direct, again, first


@settings(max_examples=80, deadline=None)
@given(series_strategy, st.floats(0.5, 20.0), st.booleans())
def test_judging_again_with_the_noise_equals_one_pass_with_it(rows: list, noise: float,
                                                             per_row: bool) -> None:
    # Reference: detect_steps itself, given the noise from the start; bit for bit.
    keys, x, y = as_arrays(rows)
    level = np.where(np.arange(len(x)) % 2, 0.95, 0.99) if per_row else 0.95
    drop = np.where(np.arange(len(x)) % 3, 0.0, 2.0) if per_row else 0.0
    direct, again, _ = _both_ways(keys, x, y, np.full(len(x), noise), level, drop)
    pd.testing.assert_frame_equal(again, direct)


def test_judging_again_on_a_fleet_takes_both_paths() -> None:
    # Reference: detect_steps with the noise in one pass. Invented series with planted
    # drops: some third readings become steps with the noise (their series are run again),
    # most only gain a judgement; both must give the one-pass result exactly.
    fleet = random_fleet(11, 3_000, 9, ties=True)
    rng = np.random.default_rng(3)
    y = fleet["y"].to_numpy() - np.where(rng.random(len(fleet)) < 0.08, 80.0, 0.0)
    x, keys = fleet["x"].to_numpy(), fleet["series"].to_numpy()
    y[rng.random(len(y)) < 0.01] = np.nan  # unusable rows stay unusable
    noise = rng.choice([4.0, 8.0, np.nan], len(x))
    direct, again, first = _both_ways(keys, x, y, noise, 0.95, 1.0)
    pd.testing.assert_frame_equal(again, direct)
    third = first["n_before"].to_numpy() == 2
    new_steps = direct["step"].to_numpy() & ~first["step"].to_numpy()
    assert (third & direct["judged"].to_numpy()).sum() > 100  # judged on the noise alone
    assert new_steps.sum() > 10  # a step only the noise finds: its series run again


def test_empty_input_and_a_series_tested_at_one_hour() -> None:
    assert trend.fit_ols([], [], []).empty and trend.fit_theil_sen([], [], []).empty
    assert trend.detect_steps([], [], []).empty
    readings = engine_fleet()
    one_hour = pd.DataFrame({"series": "same", "family_id": "A", "hours": 3000.0,
                             "value": [1040.0, 1036.0, 1041.0], "limit": 900.0})
    row = fleetfit.fit_fleet(pd.concat([readings, one_hour], ignore_index=True)).loc["same"]
    assert np.isnan(row["ols_slope"]) and row["noise_source"] == "family"
    assert row["slope_source"] == "pooled_short" and row["shrinkage"] == 0.0
    assert row["slope"] == row["family_mu"]


@pytest.mark.parametrize("one", ["short", "fast", "stray", "u3", "alone"])
def test_one_series_with_stored_family_params_equals_whole_fleet(one: str) -> None:
    # A one-unit refresh pools with the family statistics stored by the last full refresh:
    # it must give the very numbers the full refresh gave (self-consistency, no source).
    readings = engine_fleet()
    full, points = fleetfit.fit_fleet(readings, return_points=True)
    params = fleetfit.family_params(full)
    subset = readings[readings["series"] == one]
    alone, sub_points = fleetfit.fit_fleet(subset, family_params=params, return_points=True)
    pd.testing.assert_series_equal(alone.loc[one], full.loc[one], check_names=False,
                                   rtol=1e-12)
    pd.testing.assert_frame_equal(sub_points, points.loc[subset.index])


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 8), st.sampled_from(
    [1.0, -2.5, 3.0, 0.0, float("nan"), float("inf"), float("-inf")])), max_size=40),
    st.booleans())
def test_group_max_equals_the_unbuffered_ufunc(rows: list, in_order: bool) -> None:
    # Reference: numpy's np.maximum.at (the unbuffered ufunc), which _group_max replaces by
    # a reduction per run when the rows come in group order.
    rows = sorted(rows, key=lambda r: r[0]) if in_order else rows
    codes = np.array([c for c, _ in rows], dtype=np.int64)
    values = np.array([v for _, v in rows], dtype=float)
    expected = np.full(9, -np.inf)
    with np.errstate(invalid="ignore"):
        np.maximum.at(expected, codes, values)
        found = trend._group_max(codes, values, 9)
    np.testing.assert_array_equal(found, np.where(np.isfinite(expected), expected, np.nan))


def test_segment_fits_again_equal_fitting_every_segment_again() -> None:
    # Reference: fleetfit._segment_noise over every segment of the new segmentation, bit
    # for bit (each segment's fit depends on its own rows only).
    fleet = random_fleet(5, 400, 12).sort_values(["series", "x"], kind="stable")
    codes, _ = trend._factorize(fleet["series"])
    x, y = fleet["x"].to_numpy(), fleet["y"].to_numpy()
    rng = np.random.default_rng(8)
    position = np.arange(len(x)) - np.r_[0, np.flatnonzero(np.diff(codes)) + 1].repeat(
        np.diff(np.r_[0, np.flatnonzero(np.diff(codes)) + 1, len(x)]))
    before = (position >= rng.integers(3, 8, codes.max() + 1)[codes]).astype(np.int64)
    after = before.copy()
    moved = np.isin(codes, rng.choice(codes.max() + 1, 40, replace=False))
    after[moved] = (position[moved] >= 2).astype(np.int64) * 2  # other steps, more segments
    again = fleetfit._segment_noise_again(fleetfit._segment_noise(codes, before, x, y), codes,
                                          before, after, x, y)
    fresh = fleetfit._segment_noise(codes, after, x, y)
    for found, expected in zip(again, fresh, strict=True):
        np.testing.assert_array_equal(found, expected)
    assert np.isin(fresh[0], np.unique(codes[moved])).sum() > 40  # the changed ones refitted
