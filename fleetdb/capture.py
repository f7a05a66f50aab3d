"""Readings from a cranking capture: pure functions on numpy arrays.

A capture is a recording sampled at a fixed rate: a time column and one or more channels,
each already in SI (gauge kPa for in-cylinder pressure, kPa below ambient for manifold
vacuum, amperes for starter current; :func:`to_si` converts a raw column). Nothing here
reads files or the database (see :mod:`fleetdb.capture_store`).

What is derived, and how:

* **In-cylinder pressure** (a transducer in one cylinder's plug hole). Each compression
  event is a peak (``scipy.signal.find_peaks``); its height is the vertex of a least-squares
  parabola over ±5° of crank around it, so neither noise nor the sample grid biases it.
  A four-stroke cylinder compresses once every two revolutions, so the cranking speed is
  ``120 / spacing`` rpm (median over the spacings). The *first* event, the *settled* value
  (median of the last three events) and the build-up (first as % of settled, and the event
  that first reaches 90 % of settled) describe how the peaks build (domain.md §5.1: rings
  build, valves do not; the verdict is the technician's). The intake stroke lies 360–540°
  after each compression TDC, i.e. between half and three quarters of the way from one peak
  to the next: the lowest pressure there (signal averaged over 30° of crank, median over
  cycles) is the intake depression below ambient (near 0 with the throttle open; deep
  when the intake is restricted, domain.md §3.3).
* **Manifold vacuum**: mean and pulsation (5–95 % range of the signal averaged over a
  twentieth of a firing interval, or 2 ms while cranking, so noise does not count). At
  idle, the lowest vacuum of each firing event is grouped by its place in the engine cycle
  (``cylinders`` places); one place that is regularly lower than the others is the evenly
  spaced flick of one leaking cylinder (domain.md §5.4). The firing interval comes from the
  strongest pulsation in the idle range, or from an idle speed the technician gives.
* **Starter current**: one hump per compression event of any cylinder. The humps are put
  on a regular grid (a missing hump is a slot with no compression), assigned to cylinders
  through the firing order from a sync reference (a cylinder's own pressure peaks, or the
  cylinder of the first hump), and each cylinder's median hump height is its relative
  compression, % of the strongest (domain.md §4.2). Read it as a ranking: the current
  floor between humps narrows the differences when the starter's clutch overruns, and
  where strokes overlap (six cylinders and more) a weak cylinder's feeble expansion eases
  the next cylinder's compression, which then reads strongest. Both show in the model.

Tolerances reached on physics-based synthetic captures are in tests/test_capture.py.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import uniform_filter1d
from scipy.signal import find_peaks

from fleetdb.errors import FleetDBError
from fleetdb.units import KPA_PER_UNIT

#: Fastest plausible cranking speed, rpm: bounds the spacing of compression events.
MAX_CRANK_RPM = 1000.0
#: Coarsest sampling accepted for a cranking channel: crank degrees per sample.
MAX_DEG_PER_SAMPLE = 4.0
#: Half-width of the parabola fitted at each compression peak, crank degrees.
PEAK_FIT_DEG = 5.0
#: Events the settled value is the median of.
SETTLED_EVENTS = 3
#: Smallest swing that can hold compression events or starter humps.
MIN_PRESSURE_SWING_KPA = 50.0
MIN_CURRENT_SWING_A = 5.0
#: Idle speeds searched for the firing interval, rpm.
IDLE_RPM_RANGE = (300.0, 2500.0)
#: A regular idle dip is reported from 1 inHg, and only when clearly above the slot noise.
#: Chosen for this module (c: no published size; domain.md §5.4 gives the pattern only).
IDLE_DIP_MIN_KPA = KPA_PER_UNIT["inHg"]
IDLE_DIP_MIN_SE = 4.0

KINDS = ("pressure", "vacuum_cranking", "vacuum_idle", "current")


class CaptureError(FleetDBError):
    """A capture that cannot give readings; ``index`` is the sample at fault, if one is."""

    def __init__(self, message: str, index: int | None = None):
        super().__init__(message)
        self.index = index


# -- sampling and channel quality -------------------------------------------------------------

@dataclass(frozen=True)
class Sampling:
    """The time base of a capture."""

    rate_hz: float
    step_s: float
    start_s: float
    duration_s: float
    samples: int


def sampling(time_s: np.ndarray) -> Sampling:
    """Check the time column (increasing, no gaps) and give its sample rate.

    :param time_s: sample times, seconds.
    :raises CaptureError: fewer than 3 samples, time not increasing, or a gap.
    """
    t = np.asarray(time_s, dtype=float)
    if t.size < 3:
        raise CaptureError(f"holds {t.size} sample(s); a capture needs many")
    step = np.diff(t)
    bad = np.flatnonzero(~(step > 0))
    if bad.size:
        i = int(bad[0]) + 1
        raise CaptureError(f"time {t[i]:.9g} s is not after {t[i - 1]:.9g} s: the time column "
                           "must increase from sample to sample (export more decimals of time "
                           "if the values repeat)", index=i)
    median = float(np.median(step))
    gap = np.flatnonzero(step > 1.5 * median)
    if gap.size:
        i = int(gap[0]) + 1
        raise CaptureError(f"time jumps from {t[i - 1]:.9g} s to {t[i]:.9g} s (the sample step "
                           f"is {median:.3g} s): the recording has a gap; export one continuous "
                           "record", index=i)
    duration = float(t[-1] - t[0])
    return Sampling(rate_hz=(t.size - 1) / duration, step_s=duration / (t.size - 1),
                    start_s=float(t[0]), duration_s=duration, samples=int(t.size))


def check_levels(raw: np.ndarray) -> None:
    """Refuse a flat channel, or one clipped at its top or bottom (transducer saturated).

    Clipped: the channel's highest (or lowest) value is held for runs of three or more
    samples at least twice. A live transducer's noise never repeats an extreme value that
    way; a saturated one (or a scope range set too small) does (common practice, no published
    source). An 8-bit record with no noise at all can trip it: give the scope's range room.

    :param raw: the column as read.
    :raises CaptureError: with what was seen.
    """
    x = np.asarray(raw)
    lo, hi = float(np.min(x)), float(np.max(x))
    if hi == lo:
        raise CaptureError(f"is flat: every sample reads {hi:g}; is the transducer connected "
                           "and the channel switched on?")
    for value, side in ((hi, "top"), (lo, "bottom")):
        at = x == value
        edges = np.flatnonzero(np.diff(np.concatenate([[0], at.view(np.int8), [0]])))
        runs = edges[1::2] - edges[0::2]
        long_runs = int(np.count_nonzero(runs >= 3))
        if long_runs >= 2:
            raise CaptureError(
                f"is clipped at its {side} ({value:g} held for {int(runs.max())} samples, "
                f"{long_runs} times): the transducer or the scope range saturated; record "
                "again with a larger range")


def to_si(raw: np.ndarray, kind: str, unit: str, *, slope: float = 1.0, offset: float = 0.0,
          absolute: bool = False, baro_kpa: float | None = None) -> np.ndarray:
    """Scale a raw column and convert it to fleetdb's SI for its kind.

    :param raw: the column as read (volts, or already in ``unit``).
    :param kind: ``pressure`` (gauge kPa out), ``vacuum_cranking``/``vacuum_idle`` (kPa below
        ambient out) or ``current`` (A out).
    :param unit: the unit after scaling: a pressure unit of :mod:`fleetdb.units` or ``A``.
    :param slope: value = slope · raw + offset (a transducer's scale).
    :param offset: see ``slope``.
    :param absolute: the scaled value is absolute pressure (a MAP sensor, an absolute
        transducer), not gauge or vacuum; ``baro_kpa`` converts it.
    :param baro_kpa: ambient absolute pressure, kPa (needed when ``absolute``).
    """
    value = slope * np.asarray(raw, dtype=float) + offset
    if kind == "current":
        return value
    kpa = value * KPA_PER_UNIT[unit]
    if absolute:
        if baro_kpa is None:
            raise CaptureError("an absolute channel needs the barometer")
        kpa = kpa - baro_kpa  # gauge
        return kpa if kind == "pressure" else -kpa
    return kpa


def moving_average(x: np.ndarray, width: int) -> np.ndarray:
    """Centred moving average over ``width`` samples (the end samples repeated beyond)."""
    if width <= 1:
        return np.asarray(x, dtype=float)
    return uniform_filter1d(np.asarray(x, dtype=float), size=int(width), mode="nearest")


def noise_sd(x: np.ndarray) -> float:
    """White-noise standard deviation from the median absolute first difference."""
    d = np.diff(np.asarray(x, dtype=float))
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2.0))


# -- in-cylinder pressure -------------------------------------------------------------------

@dataclass
class PressureResult:
    """What one in-cylinder pressure channel shows."""

    peak_times_s: np.ndarray
    peaks_kpa: np.ndarray  # gauge, per compression event
    first_kpa: float
    settled_kpa: float
    first_pct: float  # first event as % of settled
    events_to_90pct: int  # 1-based event that first reaches 90 % of settled
    crank_rpm: float
    intake_depression_kpa: float  # lowest intake-stroke pressure below ambient (positive)
    deg_per_sample: float
    #: Each cycle's lowest intake-stroke pressure below ambient (between events i and i+1).
    depression_by_cycle_kpa: np.ndarray = field(default_factory=lambda: np.empty(0))
    #: Cranking speed over each spacing between events i and i+1, rpm.
    rpm_by_cycle: np.ndarray = field(default_factory=lambda: np.empty(0))
    #: Sample index of each event's highest sample (before the parabola).
    peak_index: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=int))
    #: The smoothed intake stroke of each cycle at 64 points (rows: cycles; gauge kPa).
    intake_by_cycle_kpa: np.ndarray = field(default_factory=lambda: np.empty((0, 64)))


def _refine_peaks(x: np.ndarray, idx: np.ndarray, half: int) -> tuple[np.ndarray, np.ndarray]:
    """Vertex of a least-squares parabola over ±half samples at each index (value, offset)."""
    u = np.arange(-half, half + 1) / half
    design = np.vander(u, 3, increasing=True)
    window = x[idx[:, None] + np.arange(-half, half + 1)[None, :]]
    c0, c1, c2 = (window @ np.linalg.pinv(design).T).T
    shift = np.where(c2 < 0, -c1 / (2 * np.where(c2 < 0, c2, -1.0)), 0.0)
    good = (c2 < 0) & (np.abs(shift) <= 1.0)
    value = np.where(good, c0 + c1 * shift + c2 * shift**2, x[idx])
    return value, np.where(good, shift * half, 0.0)


def compression_events(time_s: np.ndarray, gauge_kpa: np.ndarray, rate_hz: float) -> \
        PressureResult:
    """Find the compression events of one cylinder and describe them.

    :param time_s: sample times, seconds (uniform, see :func:`sampling`).
    :param gauge_kpa: in-cylinder gauge pressure, kPa.
    :param rate_hz: sample rate.
    :raises CaptureError: no events, fewer than two, or a sample rate too low for the speed.
    """
    x = np.asarray(gauge_kpa, dtype=float)
    base = float(np.median(x))
    swing = float(np.percentile(x, 99.9)) - base
    if swing < MIN_PRESSURE_SWING_KPA:
        raise CaptureError(f"shows no compression events: it swings only {swing:.0f} kPa. Is "
                           "the transducer connected and its scale right? A cylinder with no "
                           "compression at all is better logged by hand ('fleetdb log')")
    prominence = max(0.25 * swing, 6.0 * noise_sd(x), 20.0)
    distance = max(1, int(0.5 * 120.0 / MAX_CRANK_RPM * rate_hz))
    peaks, _ = find_peaks(x, prominence=prominence, distance=distance)
    if peaks.size >= 2:
        rpm0 = 120.0 / float(np.median(np.diff(time_s[peaks])))
        deg = rpm0 * 6.0 / rate_hz
        if deg > MAX_DEG_PER_SAMPLE:
            need = rpm0 * 6.0 / MAX_DEG_PER_SAMPLE
            raise CaptureError(f"sample rate {rate_hz:.0f} Hz is too low for cranking at "
                               f"{rpm0:.0f} rpm: record at {need:.0f} Hz or more (one sample "
                               f"per {MAX_DEG_PER_SAMPLE:g} crank degrees)")
        half = max(1, int(round(PEAK_FIT_DEG / deg)))
        peaks = peaks[(peaks >= half) & (peaks < x.size - half)]  # events cut by the ends
    if peaks.size < 2:
        duration = float(time_s[-1] - time_s[0])
        raise CaptureError(f"holds {peaks.size} whole compression event(s) in {duration:.2f} s; "
                           "two or more are needed (crank for at least four revolutions, "
                           "about 1.5 s at 200 rpm)")
    heights, shift = _refine_peaks(x, peaks, half)
    times = np.interp(peaks + shift, np.arange(x.size), time_s)
    spacing = np.diff(times)
    rpm = float(np.median(120.0 / spacing))
    settled = float(np.median(heights[-min(SETTLED_EVENTS, heights.size - 1):]))
    reached = np.flatnonzero(heights >= 0.9 * settled)
    # The intake stroke, 360-540 degrees after each TDC, sampled at 64 points per cycle.
    smooth = moving_average(x, max(1, int(round(30.0 / deg))))
    frac = np.linspace(0.5, 0.75, 64)
    pos = np.rint(peaks[:-1, None] + frac[None, :] * np.diff(peaks)[:, None]).astype(int)
    intake = smooth[pos]
    depression = -float(np.min(np.median(intake, axis=0)))
    return PressureResult(
        peak_index=peaks, intake_by_cycle_kpa=intake,
        depression_by_cycle_kpa=-np.min(intake, axis=1), rpm_by_cycle=120.0 / spacing,
        peak_times_s=times, peaks_kpa=heights, first_kpa=float(heights[0]),
        settled_kpa=settled, first_pct=float(100.0 * heights[0] / settled),
        events_to_90pct=int(reached[0]) + 1, crank_rpm=rpm,
        intake_depression_kpa=depression, deg_per_sample=float(deg))


# -- manifold vacuum --------------------------------------------------------------------------

@dataclass
class VacuumResult:
    """What a manifold vacuum channel shows (kPa below ambient)."""

    mean_kpa: float
    pulsation_kpa: float  # 5-95 % range
    idle: bool
    firing_hz: float | None = None
    dip_kpa: float | None = None  # how much lower one place of the cycle regularly reads
    dip_se_kpa: float | None = None
    dip_place: int | None = None  # 0-based place in the cycle, counted from the first event
    regular_dip: bool = False
    cycles: int = 0


def _firing_hz(x: np.ndarray, rate_hz: float, cylinders: int, idle_rpm: float | None) -> float:
    if idle_rpm is not None:
        return idle_rpm / 120.0 * cylinders
    lo, hi = (r / 120.0 * cylinders for r in IDLE_RPM_RANGE)
    spectrum = np.abs(np.fft.rfft(x - x.mean()))
    freq = np.fft.rfftfreq(x.size, 1.0 / rate_hz)
    band = (freq >= lo) & (freq <= hi)
    if not band.any():
        raise CaptureError("is too short to show the idle firing pulses")
    return float(freq[band][np.argmax(spectrum[band])])


def vacuum_summary(vacuum_kpa: np.ndarray, rate_hz: float, *, idle: bool,
                   cylinders: int | None = None, idle_rpm: float | None = None) -> VacuumResult:
    """Mean and pulsation of a vacuum channel; at idle, the regular dip of one cylinder.

    :param vacuum_kpa: manifold vacuum, kPa below ambient.
    :param rate_hz: sample rate.
    :param idle: the engine was idling (else cranking).
    :param cylinders: the engine's cylinder count (idle dips need it).
    :param idle_rpm: approximate idle speed; when None it is the strongest pulsation in the
        idle range (give it when a leak is so strong that it outweighs the firing pulses).
    """
    x = np.asarray(vacuum_kpa, dtype=float)
    mean = float(x.mean())
    if not idle or not cylinders:
        # Cranking pulses come at 67 Hz at most (8 cylinders, 1000 rpm): a 2 ms average
        # keeps them (97 %) and takes the instrument's noise out of the pulsation.
        p5, p95 = np.percentile(moving_average(x, max(1, int(rate_hz * 0.002))), [5, 95])
        return VacuumResult(mean_kpa=mean, pulsation_kpa=float(p95 - p5), idle=idle)
    firing = _firing_hz(x, rate_hz, cylinders, idle_rpm)
    per_event = rate_hz / firing
    if per_event < 8:
        raise CaptureError(f"sample rate {rate_hz:.0f} Hz is too low for idle firing pulses at "
                           f"{firing:.1f} Hz: record at {8 * firing:.0f} Hz or more")
    smooth = moving_average(x, max(1, int(per_event / 20)))
    p5, p95 = np.percentile(smooth, [5, 95])
    out = VacuumResult(mean_kpa=mean, pulsation_kpa=float(p95 - p5), idle=idle)
    lows, _ = find_peaks(-smooth, distance=max(1, int(0.6 * per_event)),
                         prominence=max(4.0 * noise_sd(smooth), 0.1 * (p95 - p5)))
    return idle_dips(out, lows, smooth[lows], rate_hz, cylinders, firing)


def idle_dips(out: VacuumResult, lows: np.ndarray, values: np.ndarray, rate_hz: float,
              cylinders: int, firing: float) -> VacuumResult:
    """Group the lows of the idle firing events by their place in the engine cycle and fill
    in ``out``'s dip (see :func:`vacuum_summary`).

    :param lows: sample index of each firing event's lowest (smoothed) vacuum, in order.
    :param values: the smoothed vacuum there.
    :param firing: the firing frequency found, Hz (kept when the lows are too few).
    """
    if lows.size < 2 * cylinders + 1:
        out.firing_hz = firing
        return out
    # Place each low on the firing grid (a missed low leaves its slot empty).
    gap = np.diff(lows)
    step = float(np.median(gap))
    slot = np.concatenate([[0], np.cumsum(np.maximum(1, np.rint(gap / step)).astype(int))])
    place = slot % cylinders
    counts = np.bincount(place, minlength=cylinders)
    if counts.min() < 2:
        out.firing_hz = firing
        return out
    means = np.bincount(place, values, minlength=cylinders) / counts
    resid = values - means[place]
    se = float(np.sqrt(np.sum(resid**2) / max(1, values.size - cylinders) / counts.min()))
    worst = int(np.argmin(means))
    dip = float(np.median(np.delete(means, worst)) - means[worst])
    out.firing_hz = rate_hz / step
    out.dip_kpa, out.dip_se_kpa, out.dip_place = dip, se, worst
    out.cycles = int(counts.min())
    out.regular_dip = dip >= IDLE_DIP_MIN_KPA and dip >= IDLE_DIP_MIN_SE * max(se, 1e-12)
    return out


# -- starter current --------------------------------------------------------------------------

@dataclass
class CurrentResult:
    """Starter-current humps assigned to cylinders."""

    hump_times_s: np.ndarray  # every slot of the hump grid, in order
    hump_heights_a: np.ndarray  # NaN for slots left out (inrush)
    hump_cylinders: np.ndarray
    relative_pct: dict[int, float]  # cylinder -> % of the strongest
    height_a: dict[int, float]
    crank_rpm: float
    sync: str
    humps_used: int = 0


def hump_swing(x: np.ndarray) -> float:
    """The current's 0.5-99.5 % range, A; refuses a channel too flat to hold humps."""
    swing = float(np.percentile(x, 99.5) - np.percentile(x, 0.5))
    check_hump_swing(swing)
    return swing


def check_hump_swing(swing: float) -> None:
    """:raises CaptureError: a swing too small to hold compression humps."""
    if swing < MIN_CURRENT_SWING_A:
        raise CaptureError(f"shows no compression humps: it swings only {swing:.1f} A. Is the "
                           "clamp on the starter cable, and its scale right?")


def hump_candidates(x: np.ndarray, rate_hz: float, cylinders: int,
                    swing: float) -> tuple[np.ndarray, np.ndarray]:
    """Peaks of the current averaged over 1 ms: (sample index, prominence)."""
    distance = max(1, int(0.5 * 120.0 / (MAX_CRANK_RPM * cylinders) * rate_hz))
    smooth = moving_average(x, max(1, int(rate_hz * 0.001)))  # 1 ms
    found, props = find_peaks(smooth, distance=distance,
                              prominence=max(6.0 * noise_sd(smooth), 0.05 * swing))
    return found, props["prominences"]


def hump_grid(found: np.ndarray, prominences: np.ndarray,
              cylinders: int) -> tuple[np.ndarray, float]:
    """The regular grid of hump places (sample positions) and its step, in samples."""
    if found.size >= 3:
        found = found[prominences >= 0.2 * np.percentile(prominences, 90)]
    if found.size < 2 * cylinders:
        raise CaptureError(f"holds {found.size} compression hump(s); two engine cycles "
                           f"({2 * cylinders} humps on {cylinders} cylinders) are needed")
    gap = np.diff(found)
    step = float(np.median(gap))
    slot = np.concatenate([[0], np.cumsum(np.maximum(1, np.rint(gap / step)).astype(int))])
    grid = np.interp(np.arange(slot[-1] + 1), slot, found)
    return grid, step


def hump_rpm(step: float, rate_hz: float, cylinders: int) -> float:
    """Cranking speed from the hump step; :raises CaptureError: sample rate too low."""
    rpm = 120.0 / (cylinders * step / rate_hz)
    if rpm * 6.0 / rate_hz > MAX_DEG_PER_SAMPLE:
        raise CaptureError(f"sample rate {rate_hz:.0f} Hz is too low for cranking at {rpm:.0f} "
                           f"rpm: record at {rpm * 6.0 / MAX_DEG_PER_SAMPLE:.0f} Hz or more")
    return rpm


def hump_extremes(x: np.ndarray, grid: np.ndarray, step: float, size: int | None = None,
                  first: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Highest and lowest current within half a hump period of each grid place.

    :param x: the current averaged over a twentieth of a hump period (samples ``first`` on).
    :param grid: hump places, sample positions in the whole recording.
    :param size: samples in the whole recording (default: ``first + x.size``).
    :param first: the whole recording's index of ``x[0]``.
    """
    size = first + x.size if size is None else size
    half = max(1, int(0.5 * step))
    centre = np.rint(grid).astype(int)
    lo = np.clip(centre - half, 0, size - 2)
    hi = np.clip(centre + half, lo + 1, size - 1)
    bounds = np.ravel(np.column_stack([lo, hi])) - first
    return np.maximum.reduceat(x, bounds)[0::2], np.minimum.reduceat(x, bounds)[0::2]


def current_humps(time_s: np.ndarray, amps: np.ndarray, rate_hz: float, cylinders: int,
                  firing_order: tuple[int, ...], *,
                  sync_peak_times: np.ndarray | None = None, sync_cylinder: int | None = None,
                  first_hump: int | None = None) -> CurrentResult:
    """Assign the starter-current humps to cylinders and give each one's relative compression.

    Each hump's height is the highest current within half a hump period of its place on the
    grid, above the lowest current in the same window; a cylinder's height is its median
    over the humps after the inrush. Sync: the pressure peaks of ``sync_cylinder`` (each
    belongs to the last hump at or before it, since the load peaks before top dead centre),
    or ``first_hump``, the cylinder of the first hump found.

    :param time_s: sample times, seconds.
    :param amps: starter current, A.
    :param rate_hz: sample rate.
    :param cylinders: cylinder count.
    :param firing_order: cylinder numbers in firing order.
    :param sync_peak_times: times of a known cylinder's compression peaks, seconds.
    :param sync_cylinder: that cylinder.
    :param first_hump: the cylinder of the first hump (used when no pressure peaks are given).
    :raises CaptureError: too few humps, too low a sample rate, or a sync that does not fit.
    """
    x = np.asarray(amps, dtype=float)
    found, prominences = hump_candidates(x, rate_hz, cylinders, hump_swing(x))
    grid, step = hump_grid(found, prominences, cylinders)
    rpm = hump_rpm(step, rate_hz, cylinders)
    x = moving_average(x, max(1, int(step / 20)))
    top, bottom = hump_extremes(x, grid, step)
    times = np.interp(grid, np.arange(x.size), time_s)
    return assign_humps(times, top, bottom, step, rate_hz, rpm, cylinders, firing_order,
                        sync_peak_times=sync_peak_times, sync_cylinder=sync_cylinder,
                        first_hump=first_hump)


def assign_humps(times: np.ndarray, top: np.ndarray, bottom: np.ndarray, step: float,
                 rate_hz: float, rpm: float, cylinders: int, firing_order: tuple[int, ...], *,
                 sync_peak_times: np.ndarray | None = None, sync_cylinder: int | None = None,
                 first_hump: int | None = None) -> CurrentResult:
    """The humps measured (time, top and bottom of each grid place) assigned to cylinders
    (see :func:`current_humps`)."""
    heights = top - bottom
    # Inrush: windows whose floor stands well above the usual floor are left out.
    floor = np.median(bottom)
    spread = 1.4826 * np.median(np.abs(bottom - floor)) + 0.02 * float(np.median(heights))
    heights = np.where(bottom > floor + 4.0 * spread, np.nan, heights)
    if sync_peak_times is not None and sync_cylinder is not None:
        owner = np.searchsorted(times, np.asarray(sync_peak_times) + 0.15 * step / rate_hz) - 1
        owner = owner[owner >= 0]
        if owner.size == 0:
            raise CaptureError(f"no current hump comes before cylinder {sync_cylinder}'s "
                               "pressure peaks: are both channels of the same recording?")
        start = (firing_order.index(sync_cylinder) - owner) % cylinders
        votes = np.bincount(start, minlength=cylinders)
        if votes.max() < 0.8 * owner.size:
            raise CaptureError(f"cylinder {sync_cylinder}'s pressure peaks do not fall at one "
                               "place of the engine cycle among the current humps: are both "
                               "channels from the same recording?")
        first_pos = int(np.argmax(votes))
        sync = f"pressure peaks of cylinder {sync_cylinder}"
    elif first_hump is not None:
        first_pos = firing_order.index(first_hump)
        sync = f"first hump is cylinder {first_hump}"
    else:
        raise CaptureError("needs a sync reference: a pressure channel of a known cylinder, or "
                           "the cylinder of the first hump")
    cyl = np.asarray(firing_order)[(first_pos + np.arange(times.size)) % cylinders]
    height: dict[int, float] = {}
    for c in firing_order:
        h = heights[(cyl == c) & ~np.isnan(heights)]
        height[c] = float(np.median(h)) if h.size else float("nan")
    strongest = np.nanmax(list(height.values()))
    relative = {c: (0.0 if np.isnan(h) else float(100.0 * h / strongest))
                for c, h in height.items()}
    return CurrentResult(hump_times_s=times, hump_heights_a=heights, hump_cylinders=cyl,
                         relative_pct=dict(sorted(relative.items())),
                         height_a=dict(sorted(height.items())), crank_rpm=float(rpm),
                         sync=sync, humps_used=int(np.count_nonzero(~np.isnan(heights))))


# -- display ----------------------------------------------------------------------------------

def envelope(time_s: np.ndarray, values: np.ndarray, *, start_s: float | None = None,
             end_s: float | None = None, buckets: int = 2000) -> tuple[np.ndarray, np.ndarray]:
    """A channel thinned for drawing: the lowest and highest sample of each time bucket.

    A line through the points returned traces the channel's envelope, so every compression
    peak and every intake-stroke trough survives however many samples are dropped; a
    window that holds at most ``2 * buckets`` samples comes back whole (full resolution).
    One sample either side of the window is kept so the line reaches its edges.

    :param time_s: sample times, seconds, increasing.
    :param values: the channel, same length.
    :param start_s: start of the window (None: the first sample).
    :param end_s: end of the window (None: the last sample).
    :param buckets: how many buckets (at most twice as many points come back).
    :returns: (times, values) of the points to draw, in time order.
    """
    t = np.asarray(time_s)
    x = np.asarray(values)
    lo = 0 if start_s is None else max(0, int(np.searchsorted(t, start_s, "left")) - 1)
    hi = t.size if end_s is None else min(t.size, int(np.searchsorted(t, end_s, "right")) + 1)
    hi = max(hi, min(t.size, lo + 2))
    n = hi - lo
    if n <= 2 * buckets:
        return t[lo:hi], x[lo:hi]
    size = -(-n // buckets)
    whole = n // size * size
    blocks = x[lo:lo + whole].reshape(-1, size)
    starts = lo + size * np.arange(blocks.shape[0])
    first = starts + np.argmin(blocks, axis=1)
    second = starts + np.argmax(blocks, axis=1)
    picks = [np.minimum(first, second), np.maximum(first, second)]
    if whole < n:  # the tail, shorter than a bucket
        tail = x[lo + whole:hi]
        ends = sorted({lo + whole + int(np.argmin(tail)), lo + whole + int(np.argmax(tail))})
        picks.append(np.asarray(ends))
    idx = np.concatenate([np.column_stack(picks[:2]).ravel(), *picks[2:]])
    return t[idx], x[idx]
