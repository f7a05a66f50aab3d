"""The physics the demo generator uses to turn an engine's condition into gauge readings.

Two parts are published physics (domain.md §3.1, §3.3):

* altitude: gauge peak p_g = p_baro * (CR**n - 1), so a reading scales with the ambient
  absolute pressure (``fleetdb.atmosphere``);
* intake restriction: with manifold vacuum v while cranking,
  p_g / p_g(open) = ((p_baro - v) * CR**n - p_baro) / (p_baro * (CR**n - 1)), n = 1.3.

The rest is a **demo model, invented** (no universal formula exists): how a weak battery
slows cranking, how slow cranking lowers the reading, and what oil does in a wet test.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from fleetdb import atmosphere

#: Polytropic exponent of a cranking compression stroke (domain.md §3.1, (b)).
POLYTROPIC_N = 1.3

#: Demo model, invented: battery volts under crank of a healthy 12 V system, and the
#: volts at which the starter stalls; cranking speed is taken proportional to the excess.
NOMINAL_CRANK_VOLTS = 10.45
STALL_VOLTS = 7.2

#: Demo model, invented: below REFERENCE_RPM a reading falls as (rpm / REFERENCE_RPM)**beta
#: (more time per stroke for leakage and heat loss). Keys: spark-ignition, diesel.
REFERENCE_RPM = {True: 200.0, False: 180.0}
SPEED_EXPONENT = {True: 0.30, False: 0.40}

#: Demo model, invented: the wet-test rise is WET_OIL_RISE (oil taking clearance volume,
#: domain.md §5.2) plus WET_RING_SEAL times the fraction of new-engine compression lost to
#: ring wear. Oil does not seal a valve or a gasket.
WET_OIL_RISE = 0.03
WET_RING_SEAL = 0.30


def intake_restriction_factor(
    compression_ratio: ArrayLike, baro_kpa: ArrayLike, vacuum_kpa: ArrayLike,
    n: float = POLYTROPIC_N,
) -> np.ndarray:
    """Fraction of the open-intake gauge reading left when cranking at ``vacuum_kpa``.

    :param compression_ratio: static compression ratio.
    :param baro_kpa: ambient absolute pressure, kPa.
    :param vacuum_kpa: manifold vacuum while cranking, kPa below ambient.
    :param n: polytropic exponent.
    """
    restricted = atmosphere.polytropic_gauge_kpa(compression_ratio, baro_kpa, n, vacuum_kpa)
    open_intake = atmosphere.polytropic_gauge_kpa(compression_ratio, baro_kpa, n, 0.0)
    return np.asarray(restricted, dtype=float) / np.asarray(open_intake, dtype=float)


def altitude_factor(baro_kpa: ArrayLike) -> np.ndarray:
    """Gauge reading at ``baro_kpa`` over the same engine's reading at sea level.

    :param baro_kpa: ambient absolute pressure, kPa.
    """
    return np.asarray(baro_kpa, dtype=float) / atmosphere.P0_KPA


def cranking_rpm(battery_v: ArrayLike, nominal_rpm: ArrayLike) -> np.ndarray:
    """Demo model, invented: cranking speed from battery volts under crank.

    :param battery_v: volts under crank (12 V system).
    :param nominal_rpm: the family's cranking speed at :data:`NOMINAL_CRANK_VOLTS`.
    """
    span = NOMINAL_CRANK_VOLTS - STALL_VOLTS
    excess = (np.asarray(battery_v, dtype=float) - STALL_VOLTS) / span
    return np.asarray(nominal_rpm, dtype=float) * np.clip(excess, 0.0, None)


def cranking_speed_factor(crank_rpm: ArrayLike, spark_ignition: ArrayLike) -> np.ndarray:
    """Demo model, invented: reading at ``crank_rpm`` over the reading at normal speed.

    :param crank_rpm: cranking speed.
    :param spark_ignition: True for gasoline/LPG/CNG, False for diesel (array or scalar).
    """
    si = np.broadcast_to(np.asarray(spark_ignition, dtype=bool), np.shape(crank_rpm))
    ref = np.where(si, REFERENCE_RPM[True], REFERENCE_RPM[False])
    beta = np.where(si, SPEED_EXPONENT[True], SPEED_EXPONENT[False])
    return np.minimum(np.asarray(crank_rpm, dtype=float) / ref, 1.0) ** beta


def wet_rise_fraction(ring_loss_fraction: ArrayLike, ring_path: ArrayLike = True) -> np.ndarray:
    """Demo model, invented: relative rise of a wet reading over the dry one.

    :param ring_loss_fraction: share of the new-engine reading lost to ring and bore wear.
    :param ring_path: False where the leak is a valve or gasket (oil cannot seal it).
    """
    seal = np.where(np.asarray(ring_path, dtype=bool), WET_RING_SEAL, 0.2 * WET_RING_SEAL)
    return WET_OIL_RISE + seal * np.clip(np.asarray(ring_loss_fraction, dtype=float), 0.0, None)
