"""Standard-atmosphere pressure from elevation, and barometric normalisation.

The troposphere formula of the ICAO Standard Atmosphere (Doc 7488/3), ISO 2533:1975
and the U.S. Standard Atmosphere 1976, which agree below 32 km:
p(H) = p0 * (1 - L*H/T0) ** (g0*M0 / (R* L)), H geopotential, from geometric height
h by H = r0*h / (r0 + h).

Gauge compression scales with the ambient absolute pressure (polytropic model
p_g = p_baro * (CR**n - 1)), so a reading taken at p_baro is normalised to sea level
by the factor p0 / p_baro. Vacuum below ambient is shifted by the barometric drop
instead: at equal absolute manifold pressure, vacuum = p_baro - MAP_abs.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

P0_KPA = 101.325  # standard sea-level pressure, kPa (exact)
T0_K = 288.15  # K
LAPSE_K_PER_M = 0.0065  # K per geopotential metre
G0 = 9.80665  # m/s^2
M0 = 0.0289644  # kg/mol, USSA 1976
R_STAR = 8.31432  # J/(mol K), the USSA 1976 value (not CODATA)
R0_M = 6_356_766.0  # m, Earth radius used for geopotential height
EXPONENT = G0 * M0 / (R_STAR * LAPSE_K_PER_M)  # 5.25587611...


def geopotential_m(h_m: ArrayLike) -> np.ndarray | float:
    """Geopotential height (m) from geometric height (m)."""
    h = np.asarray(h_m, dtype=float)
    out = R0_M * h / (R0_M + h)
    return float(out) if out.ndim == 0 else out


def pressure_kpa(elevation_m: ArrayLike) -> np.ndarray | float:
    """Standard-atmosphere pressure (kPa absolute) at a geometric elevation (m).

    Valid in the troposphere (below 11 km geopotential), which holds every workshop.

    :param elevation_m: geometric height above mean sea level, metres; scalar or array.
    """
    big_h = np.asarray(geopotential_m(elevation_m), dtype=float)
    out = P0_KPA * (1.0 - LAPSE_K_PER_M * big_h / T0_K) ** EXPONENT
    return float(out) if out.ndim == 0 else out


def pressure_altitude_m(p_kpa: ArrayLike) -> np.ndarray | float:
    """Geometric elevation (m) at which the standard atmosphere has pressure ``p_kpa``."""
    p = np.asarray(p_kpa, dtype=float)
    big_h = (T0_K / LAPSE_K_PER_M) * (1.0 - (p / P0_KPA) ** (1.0 / EXPONENT))
    out = R0_M * big_h / (R0_M - big_h)
    return float(out) if out.ndim == 0 else out


def compression_to_sea_level(gauge_kpa: ArrayLike, baro_kpa: ArrayLike) -> np.ndarray | float:
    """Normalise a gauge compression reading taken at ``baro_kpa`` to sea level.

    :param gauge_kpa: gauge peak pressure as measured, kPa.
    :param baro_kpa: absolute ambient pressure where it was measured, kPa.
    """
    out = np.asarray(gauge_kpa, dtype=float) * (P0_KPA / np.asarray(baro_kpa, dtype=float))
    return float(out) if out.ndim == 0 else out


def compression_from_sea_level(gauge_kpa_sl: ArrayLike, baro_kpa: ArrayLike) -> np.ndarray | float:
    """Inverse of :func:`compression_to_sea_level`: the gauge reading expected at ``baro_kpa``."""
    out = np.asarray(gauge_kpa_sl, dtype=float) * (np.asarray(baro_kpa, dtype=float) / P0_KPA)
    return float(out) if out.ndim == 0 else out


def vacuum_to_sea_level(vacuum_kpa: ArrayLike, baro_kpa: ArrayLike) -> np.ndarray | float:
    """Normalise a vacuum (kPa below ambient) to the sea-level equivalent.

    The engine needs about the same absolute manifold pressure wherever it runs, so
    the vacuum reading falls by the barometric drop: add that drop back.
    """
    out = np.asarray(vacuum_kpa, dtype=float) + (P0_KPA - np.asarray(baro_kpa, dtype=float))
    return float(out) if out.ndim == 0 else out


def polytropic_gauge_kpa(
    compression_ratio: ArrayLike,
    baro_kpa: ArrayLike = P0_KPA,
    n: float = 1.3,
    intake_vacuum_kpa: ArrayLike = 0.0,
) -> np.ndarray | float:
    """Ideal cranking peak (gauge kPa) of the polytropic model p V**n = const.

    p_g = (p_baro - vacuum) * CR**n - p_baro. The model over-predicts real levels;
    fleetdb uses it for ratios (altitude, intake restriction), never for limits.
    """
    cr = np.asarray(compression_ratio, dtype=float)
    baro = np.asarray(baro_kpa, dtype=float)
    out = (baro - np.asarray(intake_vacuum_kpa, dtype=float)) * cr**n - baro
    return float(out) if out.ndim == 0 else out
