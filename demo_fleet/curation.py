"""Demo curation: keep the units meant to be sound free of accidental alarms.

The generator's noise is honest, so once in a while a sound unit's readings would line up
into what a trend analysis must call an alarm: a sudden drop on the latest test, a cylinder
wearing significantly faster than its family, or a projected crossing of the minimum within
a year. A demo that promises "no false alarm on these units" re-draws the gauge noise of
such a unit (a few rounds at most) and finally raises any latest reading still below the
sudden-drop band to its trend. Only noise is touched: levels, wear and conditions stay.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from demo_fleet.catalogue import FAMILIES, SITES
from demo_fleet.readings import STEP, draw_noise, set_values, test_valid
from fleetdb import atmosphere
from fleetdb.units import KPA_PER_UNIT

#: A cylinder slope this many standard errors steeper than its family's is re-drawn
#: (stricter than a Bonferroni-corrected 95 % test over four to six cylinders).
FASTER_Z = 2.0
#: A series whose hours span less wear than this (at the family rate, kPa) is judged
#: against no wear at all: its slope is mostly gauge noise.
SHORT_SPAN_LOSS_KPA = 15.0
#: Rounds of re-drawing before giving up on a unit.
ROUNDS = 30


def steady_sound_units(dry: pd.DataFrame, tests: pd.DataFrame, units: pd.DataFrame,
                       judged: np.ndarray, reference: np.ndarray,
                       rng: np.random.Generator) -> None:
    """Re-draw the noise of judged units whose history would raise a wear alarm (at most
    ROUNDS rounds; each round re-draws only the units still alarming).

    :param dry: dry readings (``noise`` and ``value`` modified in place).
    :param tests: the test table (index = test id).
    :param units: the unit table.
    :param judged: per test, whether its unit is meant to be free of wear alarms.
    :param reference: per test, whether its unit's slopes inform its family's wear rate.
    :param rng: the demo's random generator.
    """
    judged_units = set(tests.loc[judged, "fleet_no"])
    for _ in range(ROUNDS):
        frame = _normalised(dry, tests, reference)
        alarming = [u for u in _alarming_units(frame[frame["usable"]], units)
                    if u in judged_units]
        if not alarming:
            return
        rows = dry["fleet_no"].isin(alarming).to_numpy()
        chosen = tests[tests["fleet_no"].isin(alarming)]
        dry.loc[rows, "noise"] = draw_noise(dry[rows], chosen, rng)
        set_values(dry, rows)
    warnings.warn(f"demo curation gave up after {ROUNDS} rounds on {', '.join(alarming)}: "
                  "these units may raise a wear alarm", RuntimeWarning, stacklevel=2)


def _normalised(dry: pd.DataFrame, tests: pd.DataFrame, eligible: np.ndarray) -> pd.DataFrame:
    """Per reading: series key, family, hours, sea-level-normalised kPa (typed barometer, else
    the standard atmosphere), whether usable (valid, current life, eligible), whether last."""
    valid = pd.Series(test_valid(tests) & eligible, index=tests.index)
    current = tests["segment"] == tests.groupby("fleet_no")["segment"].transform("max")
    usable = valid & current
    last_valid = tests[usable].groupby("fleet_no")["seq"].transform("max")
    is_last = pd.Series(False, index=tests.index)
    is_last.loc[last_valid.index] = tests.loc[last_valid.index, "seq"] == last_valid
    t = tests.loc[dry["test_id"]]
    baro = t["baro_kpa"].fillna(pd.Series(atmosphere.pressure_kpa(
        [SITES[s].elevation_m for s in t["site"]]), index=t.index)).to_numpy()
    return pd.DataFrame({
        "key": dry["fleet_no"] + "#" + dry["cylinder"].astype(str),
        "fleet_no": dry["fleet_no"].to_numpy(),
        "family": t["family"].to_numpy(),
        "x": t["hours"].to_numpy(),
        "offset": t["offset"].to_numpy(),
        "y": dry["value"].to_numpy() * dry["kpa_per_unit"].to_numpy() * atmosphere.P0_KPA / baro,
        "baro": baro,
        "usable": usable.loc[dry["test_id"]].to_numpy(),
        "last": is_last.loc[dry["test_id"]].to_numpy(),
    }, index=dry.index)


def _alarming_units(points: pd.DataFrame, units: pd.DataFrame) -> list[str]:
    """Units with a cylinder wearing significantly faster than its family, or whose one-sided
    95 % lower prediction bound reaches the minimum within a year of as_of (domain.md D12)."""
    fits = _line_fits(points)
    fits = fits[fits["n"] >= 3].copy()
    by_key = points.groupby("key")
    fits["fleet_no"] = by_key["fleet_no"].first().reindex(fits.index)
    family = by_key["family"].first().reindex(fits.index)
    # Judged strictly, so that any reasonable analysis agrees: against the shallowest of the
    # family's median slope, its inverse-variance weighted mean slope and its design rate,
    # with the series' own standard error; over
    # a short span of hours (a standby set) a slope is mostly noise: against no wear.
    design = np.array([-FAMILIES[f].wear_psi_per_hour * KPA_PER_UNIT["psi"] for f in family])
    pooled_var = (fits["s"] ** 2 * fits["df"]).groupby(family).sum() \
        / fits["df"].groupby(family).sum()
    # inverse variance of the slope, its s floored at the family's (no weight from luck)
    weight = fits["sxx"] / np.fmax(fits["s"] ** 2, pooled_var.reindex(family).to_numpy())
    weighted = (fits["slope"] * weight).groupby(family).sum() / weight.groupby(family).sum()
    mu = np.maximum.reduce([fits["slope"].groupby(family).median().reindex(family).to_numpy(),
                            weighted.reindex(family).to_numpy(), design])
    span = (by_key["x"].max() - by_key["x"].min()).reindex(fits.index).to_numpy()
    mu = np.where(-design * span < SHORT_SPAN_LOSS_KPA, np.maximum(mu, 0.0), mu)
    faster = (fits["slope"] - mu) / (fits["s"] / np.sqrt(fits["sxx"])) < -FASTER_Z

    last_x = by_key["x"].max().reindex(fits.index)
    weeks = by_key["offset"].min().reindex(fits.index) / 7.0 + 52.18  # to a year after as_of
    x1 = last_x + units["hours_per_week"].reindex(fits["fleet_no"]).to_numpy() * weeks
    t = stats.t.ppf(0.95, fits["df"])
    lower = fits["ybar"] + fits["slope"] * (x1 - fits["xbar"]) - t * fits["s"] * np.sqrt(
        1.0 + 1.0 / fits["n"] + (x1 - fits["xbar"]) ** 2 / fits["sxx"])
    g = (t * fits["s"]) ** 2 / (fits["slope"] ** 2 * fits["sxx"])
    limit = np.array([FAMILIES[f].min_kpa for f in family])
    crossing = (fits["slope"] < 0) & (g < 1) & (lower <= limit)
    return sorted(set(fits.loc[faster | crossing, "fleet_no"]))


def settle_latest(dry: pd.DataFrame, tests: pd.DataFrame, eligible: np.ndarray) -> None:
    """Keep sound units' latest valid readings inside their own trend (demo curation).

    For each eligible (unit, cylinder) series of the current engine life, a latest reading
    below the lower bound of the two-sided 95 % prediction interval of the straight-line fit
    of the earlier valid readings (domain.md D11, §6.1) would read as a sudden drop. With
    three or more earlier readings the fit's own s is used; with two, the residual s pooled
    over the family's fits. Such a reading is raised to the fitted value (rounded up in its
    unit).

    :param dry: from :func:`dry_compression` (``value`` modified in place).
    :param tests: the test table (index = test id).
    :param eligible: per test, whether its unit takes part.
    """
    frame = _normalised(dry, tests, eligible)
    factor = dry["kpa_per_unit"].to_numpy()
    baro = frame["baro"].to_numpy()
    fits = _line_fits(frame[frame["usable"] & ~frame["last"]])
    last = frame[frame["last"]].join(fits, on="key", how="inner")
    last = last[(last["n"] >= 2) & (last["sxx"] > 0)]
    predicted = last["ybar"] + last["slope"] * (last["x"] - last["xbar"])
    half = stats.t.ppf(0.975, last["df"]) * last["s"] * np.sqrt(
        1.0 + 1.0 / last["n"] + (last["x"] - last["xbar"]) ** 2 / last["sxx"])
    low = last.index[(last["y"] < predicted - half).to_numpy()]
    if len(low) == 0:
        return
    where = dry.index.get_indexer(low)
    raw = predicted.loc[low].to_numpy() * baro[where] / atmosphere.P0_KPA
    step = np.array([STEP[u] for u in dry.loc[low, "units"]])
    dry.loc[low, "value"] = np.round(np.ceil(raw / factor[where] / step) * step, 1)


def _line_fits(points: pd.DataFrame) -> pd.DataFrame:
    """Per series ``key``: n, means, Sxx, slope, residual s and its df (pooled by family
    where the series has only two points)."""
    points = points.assign(xx=points["x"] ** 2, xy=points["x"] * points["y"],
                           yy=points["y"] ** 2)
    sums = points.groupby("key")[["x", "y", "xx", "xy", "yy"]].sum()
    n = points.groupby("key").size()
    family = points.groupby("key")["family"].first()
    sxx = sums["xx"] - sums["x"] ** 2 / n
    sxy = sums["xy"] - sums["x"] * sums["y"] / n
    syy = sums["yy"] - sums["y"] ** 2 / n
    slope = sxy / sxx.where(sxx > 0)
    df = (n - 2).astype(float)
    sse = np.maximum(syy - slope * sxy, 0.0).where(df > 0)
    pooled = pd.DataFrame({"sse": sse, "df": df.where(df > 0), "family": family}).groupby(
        "family")[["sse", "df"]].sum()
    own = df > 0
    s = np.sqrt(sse / df.where(own))
    s = s.where(own, np.sqrt(pooled["sse"] / pooled["df"]).reindex(family).to_numpy())
    df = df.where(own, pooled["df"].reindex(family).to_numpy())
    return pd.DataFrame({"n": n, "xbar": sums["x"] / n, "ybar": sums["y"] / n, "sxx": sxx,
                         "slope": slope, "s": s, "df": df})
