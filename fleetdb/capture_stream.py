"""Long captures in bounded memory: spool the samples to disk, analyse them window by window.

A capture that fits in one analysis window (:func:`window_samples`) is analysed whole by
:mod:`fleetdb.capture`, as always. A longer one is read chunk by chunk into a spool (one
float64 file per column in a temporary folder) and each derivation makes one or two passes
over it in windows: a core of :func:`window_samples` samples with :data:`CONTEXT_S` seconds
of the neighbouring samples either side, so an event near a core's edge is seen whole and
counted once, by the window whose core holds it. Memory then follows the window, not the
recording's length; the samples are compressed into the store's blocks the same way.

What a window changes, and what it does not (tests/test_capture_stream.py compares both
ways on the same synthetic capture):

* exact as in one piece: the time checks (but a gap is judged against the median step of
  the first chunk read), flat and clipped channels, the mean and the 5-95 % pulsation of a
  vacuum channel (exact percentiles from a histogram pass and a pass over the few values
  in the bins that hold them), the current's swing, the hump grid and the hump heights;
* per window: the detection thresholds (noise, and a pressure channel's swing) and, for a
  pressure channel, the crank degrees per sample that set the parabola fitted at each peak
  and the 30° average of the intake stroke, and for an idle vacuum channel the firing
  frequency (from the first window unless an idle speed is given), which sets the idle
  pulsation's averaging. So on a long recording the compression peaks and intake
  depression can differ slightly from a one-piece analysis as the cranking speed drifts
  (within 0.5 % on the comparison test), and the idle pulsation by a percent or so (the
  dip itself: same place and cycles, within 0.05 kPa on 40 s of synthetic idle).
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.signal import find_peaks

from fleetdb import capture as cap
from fleetdb import capture_files
from fleetdb.capture_files import CaptureChunks, CaptureData, Channel

#: Seconds of neighbouring samples either side of a window's core: one compression cycle at
#: 60 rpm, so every event near a core's edge is seen with its neighbours.
CONTEXT_S = 2.0
#: Fewest samples in a window's core, and fewest seconds.
CORE_SAMPLES = 500_000
CORE_S = 2.0
#: Histogram bins of the exact percentile passes.
_BINS = 1 << 16


def window_samples(rate_hz: float, core_samples: int = CORE_SAMPLES) -> tuple[int, int]:
    """(core, context) samples of an analysis window at a sample rate."""
    return max(core_samples, int(CORE_S * rate_hz)), max(1, int(CONTEXT_S * rate_hz))


@dataclass
class SpooledCapture:
    """The mapped columns of a capture, kept on disk as float64 files (see module doc)."""

    name: str
    sha256: str
    file_bytes: int
    time_column: str
    time_unit: str
    samples: int
    ignored: list[str]
    folder: tempfile.TemporaryDirectory  # type: ignore[type-arg]
    columns: list[str]
    lo: dict[str, float]  # column -> lowest raw value
    hi: dict[str, float]
    chunks: list[int]  # first sample of each chunk as read
    core_samples: int = CORE_SAMPLES
    _si: dict[str, tuple[Channel, float]] = field(default_factory=dict)

    def _path(self, column: str | None) -> Path:
        names = [None, *self.columns]
        return Path(self.folder.name) / f"c{names.index(column)}.f64"

    def read(self, column: str | None, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Samples ``start:stop`` of a column (None: time in s), float64."""
        stop = self.samples if stop is None else min(stop, self.samples)
        start = max(0, start)
        return np.fromfile(self._path(column), dtype=np.float64, count=max(0, stop - start),
                           offset=8 * start)

    def whole(self) -> CaptureData:
        """Everything in memory, as :func:`fleetdb.capture_files.read_capture` gives it."""
        return CaptureData(name=self.name, sha256=self.sha256, file_bytes=self.file_bytes,
                           time_column=self.time_column, time_unit=self.time_unit,
                           time_s=self.read(None), raw={c: self.read(c) for c in self.columns},
                           ignored=list(self.ignored))

    def blocks(self) -> Iterator[tuple[np.ndarray, dict[str, np.ndarray]]]:
        """The samples in the chunks they were read in: (time, {column: raw})."""
        bounds = [*self.chunks, self.samples]
        for start, stop in zip(bounds[:-1], bounds[1:], strict=True):
            yield self.read(None, start, stop), {c: self.read(c, start, stop)
                                                  for c in self.columns}

    def close(self) -> None:
        """Remove the spool files."""
        self.folder.cleanup()


def spool_capture(path: Path | str, time_column: str, columns: list[str], *,
                  time_unit: str = "s", chunk_rows: int | None = None,
                  progress: Any = None, name: str | None = None) -> SpooledCapture:
    """Read a capture CSV chunk by chunk into a spool (same checks as ``read_capture``).

    :param chunk_rows: rows per chunk (default :data:`fleetdb.capture_files.CHUNK_ROWS`).
    :param progress: called with (bytes read, file size) as the file is read.

    :raises InvalidInput: naming the file, line and column of the first problem.
    """
    chunks = CaptureChunks(path, time_column, columns, time_unit=time_unit, progress=progress,
                           name=name, chunk_rows=chunk_rows or capture_files.CHUNK_ROWS)
    folder = tempfile.TemporaryDirectory(prefix="fleetdb-capture-")
    spool = SpooledCapture(name=chunks.name, sha256="", file_bytes=chunks.file_bytes,
                           time_column=time_column, time_unit=time_unit, samples=0,
                           ignored=chunks.ignored, folder=folder, columns=list(columns),
                           lo={c: np.inf for c in columns}, hi={c: -np.inf for c in columns},
                           chunks=[], core_samples=CORE_SAMPLES)
    try:
        files = {c: open(spool._path(c), "wb") for c in [None, *columns]}  # noqa: SIM115
        try:
            for first, time_s, raw in chunks:
                spool.chunks.append(first)
                files[None].write(np.ascontiguousarray(time_s, dtype=np.float64).tobytes())
                for c in columns:
                    files[c].write(np.ascontiguousarray(raw[c], dtype=np.float64).tobytes())
                    spool.lo[c] = min(spool.lo[c], float(np.min(raw[c])))
                    spool.hi[c] = max(spool.hi[c], float(np.max(raw[c])))
        finally:
            for fh in files.values():
                fh.close()
    except BaseException:
        folder.cleanup()
        raise
    spool.sha256, spool.samples = chunks.sha256, chunks.samples
    return spool


# -- passes over the spool --------------------------------------------------------------------

class Windows:
    """One channel of a spool in SI, window by window (see the module docstring)."""

    def __init__(self, spool: SpooledCapture, channel: Channel, rate_hz: float,
                 baro_kpa: float):
        self.spool, self.channel, self.baro_kpa = spool, channel, baro_kpa
        self.core, self.context = window_samples(rate_hz, spool.core_samples)

    def si(self, values: np.ndarray) -> np.ndarray:
        ch = self.channel
        return cap.to_si(values, ch.kind, ch.unit, slope=ch.slope, offset=ch.offset,
                         absolute=ch.absolute, baro_kpa=self.baro_kpa)

    def si_range(self) -> tuple[float, float]:
        ends = self.si(np.array([self.spool.lo[self.channel.column],
                                 self.spool.hi[self.channel.column]]))
        return float(ends.min()), float(ends.max())

    def __iter__(self) -> Iterator[tuple[int, int, int, np.ndarray, np.ndarray]]:
        """(core start, core stop, window start, time, SI values) per window, in order."""
        n = self.spool.samples
        for start in range(0, n, self.core):
            stop = min(n, start + self.core)
            first = max(0, start - self.context)
            last = min(n, stop + self.context)
            yield (start, stop, first, self.spool.read(None, first, last),
                   self.si(self.spool.read(self.channel.column, first, last)))


def check_time(spool: SpooledCapture) -> cap.Sampling:
    """:func:`fleetdb.capture.sampling` chunk by chunk (gaps against the first chunk's step).

    :raises CaptureError: with the index of the sample at fault.
    """
    n = spool.samples
    if n < 3:
        raise cap.CaptureError(f"holds {n} sample(s); a capture needs many")
    previous: float | None = None
    median: float | None = None
    first = last = 0.0
    for i, (time_s, _) in enumerate(spool.blocks()):
        start = spool.chunks[i]
        t = time_s if previous is None else np.concatenate([[previous], time_s])
        shift = start if previous is None else start - 1
        step = np.diff(t)
        bad = np.flatnonzero(~(step > 0))
        if bad.size:
            j = int(bad[0]) + 1
            raise cap.CaptureError(
                f"time {t[j]:.9g} s is not after {t[j - 1]:.9g} s: the time column must "
                "increase from sample to sample (export more decimals of time if the values "
                "repeat)", index=shift + j)
        if median is None:
            median = float(np.median(step))
            first = float(time_s[0])
        gap = np.flatnonzero(step > 1.5 * median)
        if gap.size:
            j = int(gap[0]) + 1
            raise cap.CaptureError(
                f"time jumps from {t[j - 1]:.9g} s to {t[j]:.9g} s (the sample step is "
                f"{median:.3g} s): the recording has a gap; export one continuous record",
                index=shift + j)
        previous = last = float(time_s[-1])
    duration = last - first
    return cap.Sampling(rate_hz=(n - 1) / duration, step_s=duration / (n - 1), start_s=first,
                        duration_s=duration, samples=n)


def check_levels(spool: SpooledCapture, column: str) -> None:
    """:func:`fleetdb.capture.check_levels` chunk by chunk (runs carried across chunks)."""
    lo, hi = spool.lo[column], spool.hi[column]
    if hi == lo:
        raise cap.CaptureError(f"is flat: every sample reads {hi:g}; is the transducer "
                               "connected and the channel switched on?")
    for value, side in ((hi, "top"), (lo, "bottom")):
        runs: list[np.ndarray] = []
        carry = 0
        for _, raw in spool.blocks():
            at = raw[column] == value
            edges = np.flatnonzero(np.diff(np.concatenate([[0], at.view(np.int8), [0]])))
            starts, stops = edges[0::2], edges[1::2]
            lengths = stops - starts
            if carry and starts.size and starts[0] == 0:
                lengths[0] += carry
            elif carry:
                runs.append(np.array([carry]))
            carry = 0
            if stops.size and stops[-1] == at.size:
                carry, lengths = int(lengths[-1]), lengths[:-1]
            runs.append(lengths)
        runs.append(np.array([carry]))
        every = np.concatenate(runs)
        long_runs = int(np.count_nonzero(every >= 3))
        if long_runs >= 2:
            raise cap.CaptureError(
                f"is clipped at its {side} ({value:g} held for {int(every.max())} samples, "
                f"{long_runs} times): the transducer or the scope range saturated; record "
                "again with a larger range")


def _percentiles(windows: Windows, width: int, qs: list[float]) -> list[float]:
    """Exact ``numpy.percentile`` (linear) of a channel's ``width``-sample moving average."""
    lo, hi = windows.si_range()
    span = (hi - lo) or 1.0

    def smoothed() -> Iterator[np.ndarray]:
        for start, stop, first, _, x in windows:
            yield cap.moving_average(x, width)[start - first:stop - first]

    def bins(v: np.ndarray) -> np.ndarray:
        return np.clip(((v - lo) / span * _BINS).astype(np.int64), 0, _BINS - 1)

    counts = np.zeros(_BINS, dtype=np.int64)
    n = 0
    for v in smoothed():
        counts += np.bincount(bins(v), minlength=_BINS)
        n += v.size
    below = np.concatenate([[0], np.cumsum(counts)])
    ranks = []
    for q in qs:
        k = q / 100.0 * (n - 1)
        ranks.append((k, int(np.floor(k)), min(n - 1, int(np.floor(k)) + 1)))
    wanted = sorted({int(np.searchsorted(below, r, "right")) - 1
                     for _, a, b in ranks for r in (a, b)})
    kept: dict[int, list[np.ndarray]] = {b: [] for b in wanted}
    for v in smoothed():
        idx = bins(v)
        for b in wanted:
            kept[b].append(v[idx == b])
    ordered = {b: np.sort(np.concatenate(kept[b])) for b in wanted}

    def order_stat(r: int) -> float:
        b = int(np.searchsorted(below, r, "right")) - 1
        return float(ordered[b][r - below[b]])

    out = []
    for k, a, b in ranks:
        va, vb = order_stat(a), order_stat(b)
        out.append(va + (k - a) * (vb - va))
    return out


def _mean(windows: Windows) -> float:
    total, n = 0.0, 0
    for start, stop, first, _, x in windows:
        core = x[start - first:stop - first]
        total += float(core.sum())
        n += core.size
    return total / n


# -- the derivations --------------------------------------------------------------------------

def compression_events(windows: Windows, rate_hz: float) -> cap.PressureResult:
    """:func:`fleetdb.capture.compression_events` window by window (see the module doc)."""
    times: list[np.ndarray] = []
    heights: list[np.ndarray] = []
    at: list[np.ndarray] = []  # sample index of each peak, whole recording
    raw_times: list[np.ndarray] = []
    intake: dict[int, np.ndarray] = {}  # global peak index -> intake stroke after it
    failure: cap.CaptureError | None = None
    for start, stop, first, t, x in windows:
        try:
            res = cap.compression_events(t, x, rate_hz)
        except cap.CaptureError as exc:  # a window with no cranking in it
            failure = failure or exc
            continue
        index = res.peak_index + first
        keep = np.flatnonzero((index >= start) & (index < stop))
        for j in keep:
            if j + 1 < index.size:
                intake[int(index[j])] = res.intake_by_cycle_kpa[j]
        times.append(res.peak_times_s[keep])
        heights.append(res.peaks_kpa[keep])
        at.append(index[keep])
        raw_times.append(t[res.peak_index[keep]])
    peak_times = np.concatenate(times) if times else np.empty(0)
    if peak_times.size < 2:
        if failure is not None:
            raise failure
        raise cap.CaptureError(f"holds {peak_times.size} whole compression event(s); two or "
                               "more are needed")
    peaks = np.concatenate(heights)
    index = np.concatenate(at)
    spacing = np.diff(peak_times)
    rpm = float(np.median(120.0 / spacing))
    rpm0 = 120.0 / float(np.median(np.diff(np.concatenate(raw_times))))
    settled = float(np.median(peaks[-min(cap.SETTLED_EVENTS, peaks.size - 1):]))
    reached = np.flatnonzero(peaks >= 0.9 * settled)
    profile = np.array([intake.get(int(i), np.full(64, np.nan)) for i in index[:-1]])
    return cap.PressureResult(
        peak_index=index, intake_by_cycle_kpa=profile,
        depression_by_cycle_kpa=-np.min(profile, axis=1), rpm_by_cycle=120.0 / spacing,
        peak_times_s=peak_times, peaks_kpa=peaks, first_kpa=float(peaks[0]),
        settled_kpa=settled, first_pct=float(100.0 * peaks[0] / settled),
        events_to_90pct=int(reached[0]) + 1, crank_rpm=rpm,
        intake_depression_kpa=-float(np.min(np.nanmedian(profile, axis=0))),
        deg_per_sample=float(rpm0 * 6.0 / rate_hz))


def vacuum_summary(windows: Windows, rate_hz: float, *, idle: bool, cylinders: int | None,
                   idle_rpm: float | None) -> cap.VacuumResult:
    """:func:`fleetdb.capture.vacuum_summary` window by window (see the module doc)."""
    mean = _mean(windows)
    if not idle or not cylinders:
        p5, p95 = _percentiles(windows, max(1, int(rate_hz * 0.002)), [5, 95])
        return cap.VacuumResult(mean_kpa=mean, pulsation_kpa=float(p95 - p5), idle=idle)
    start, stop, first, _, x = next(iter(windows))
    firing = cap._firing_hz(x, rate_hz, cylinders, idle_rpm)
    per_event = rate_hz / firing
    if per_event < 8:
        raise cap.CaptureError(f"sample rate {rate_hz:.0f} Hz is too low for idle firing "
                               f"pulses at {firing:.1f} Hz: record at {8 * firing:.0f} Hz or "
                               "more")
    width = max(1, int(per_event / 20))
    p5, p95 = _percentiles(windows, width, [5, 95])
    out = cap.VacuumResult(mean_kpa=mean, pulsation_kpa=float(p95 - p5), idle=idle)
    lows, values = [], []
    for start, stop, first, _, x in windows:
        smooth = cap.moving_average(x, width)
        found, _ = find_peaks(-smooth, distance=max(1, int(0.6 * per_event)),
                                  prominence=max(4.0 * cap.noise_sd(smooth), 0.1 * (p95 - p5)))
        keep = found[(found + first >= start) & (found + first < stop)]
        lows.append(keep + first)
        values.append(smooth[keep])
    return cap.idle_dips(out, np.concatenate(lows), np.concatenate(values), rate_hz,
                         cylinders, firing)


def current_humps(windows: Windows, rate_hz: float, cylinders: int,
                  firing_order: tuple[int, ...], *, sync_peak_times: np.ndarray | None = None,
                  sync_cylinder: int | None = None,
                  first_hump: int | None = None) -> cap.CurrentResult:
    """:func:`fleetdb.capture.current_humps` window by window (see the module doc)."""
    lo, hi = _percentiles(windows, 1, [0.5, 99.5])
    swing = hi - lo
    cap.check_hump_swing(swing)
    found, prominences = [], []
    for start, stop, first, _, x in windows:
        f, p = cap.hump_candidates(x, rate_hz, cylinders, swing)
        keep = (f + first >= start) & (f + first < stop)
        found.append(f[keep] + first)
        prominences.append(p[keep])
    grid, step = cap.hump_grid(np.concatenate(found), np.concatenate(prominences), cylinders)
    rpm = cap.hump_rpm(step, rate_hz, cylinders)
    width = max(1, int(step / 20))
    tops, bottoms, times = [], [], []
    n = windows.spool.samples
    centre = np.rint(grid).astype(int)
    for start, stop, first, t, x in windows:
        mine = (centre >= start) & (centre < stop)
        if not mine.any():
            continue
        smooth = cap.moving_average(x, width)
        top, bottom = cap.hump_extremes(smooth, grid[mine], step, size=n, first=first)
        tops.append(top)
        bottoms.append(bottom)
        times.append(np.interp(grid[mine], first + np.arange(x.size), t))
    return cap.assign_humps(np.concatenate(times), np.concatenate(tops),
                            np.concatenate(bottoms), step, rate_hz, rpm, cylinders,
                            firing_order, sync_peak_times=sync_peak_times,
                            sync_cylinder=sync_cylinder, first_hump=first_hump)
