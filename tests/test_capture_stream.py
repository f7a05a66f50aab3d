"""Long captures window by window (fleetdb.capture_stream) against the one-piece analysis.

The capture is the physics-based synthetic cranking of tests/capture_synth.py (slider-crank
volume, polytropic compression with leakage, starter current from the gas torque, manifold
vacuum; one leaky cylinder), written as a CSV and read back the two ways: whole, as
fleetdb.capture analyses it (itself checked against the physics and scipy in
tests/test_capture.py), and spooled in small windows so that a 12 s recording crosses many
window edges. References: scipy.signal.find_peaks on the whole signal for the events,
numpy.percentile for the pulsation. Memory is measured with tracemalloc (numpy's buffers
are traced), never timed.
"""

from __future__ import annotations

import functools
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.signal import find_peaks

from fleetdb import capture as cap
from fleetdb import capture_files, capture_store
from fleetdb import capture_stream as stream
from fleetdb.capture_files import parse_channel, parse_scale, with_scales
from fleetdb.errors import InvalidInput
from tests import capture_synth as synth

RATE = 10_000
CHANNELS = with_scales([parse_channel("p1=pressure:1:kPa"), parse_channel("amps=current"),
                        parse_channel("vac=vacuum_cranking:kPa")], [parse_scale("p1=250,-125")])


@functools.cache
def _frame(duration_s: float, rate: int = RATE, seed: int = 4) -> pd.DataFrame:
    sim = synth.simulate(synth.Geometry(), synth.Cranking(
        leak=(3e-4, 3e-4, 3e-3, 3e-4), intake_mean_kpa=4.0, intake_pulse_kpa=5.0,
        duration_s=duration_s, sag=0.05))
    rng = np.random.default_rng(seed)
    t, p1 = synth.sample(sim, rate, synth.pressure_gauge(sim, 1), 5.0, rng)
    _, amps = synth.sample(sim, rate, synth.starter_current(sim), 2.0, rng)
    _, vac = synth.sample(sim, rate, synth.manifold_vacuum(sim), 0.3, rng)
    return pd.DataFrame({"t": t, "p1": (p1 + 125.0) / 250.0, "amps": amps, "vac": vac})


def _write(path: Path, duration_s: float) -> Path:
    _frame(duration_s).to_csv(path, index=False, float_format="%.9g")
    return path


def _spool(path: Path, monkeypatch: pytest.MonkeyPatch, core: int = 15_000,
           chunk: int = 7_919) -> stream.SpooledCapture:
    """Read in chunks of ``chunk`` rows; analyse in window cores of ``core`` samples."""
    monkeypatch.setattr(stream, "CORE_SAMPLES", core)
    monkeypatch.setattr(stream, "CORE_S", 0.0)
    return stream.spool_capture(path, "t", [c.column for c in CHANNELS], chunk_rows=chunk)


def _analyse(data: capture_files.CaptureData | stream.SpooledCapture
             ) -> capture_store.CaptureAnalysis:
    return capture_store.analyse(data, CHANNELS, cylinders=4, baro_kpa=101.325,
                                 firing_order=(1, 3, 4, 2))


def test_windows_find_the_same_events_as_the_whole_recording(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = _write(tmp_path / "long.csv", 12.0)
    spool = _spool(path, monkeypatch)
    try:
        assert spool.samples > 5 * stream.window_samples(RATE, spool.core_samples)[0]
        whole = spool.whole()
        np.testing.assert_array_equal(whole.raw["amps"],
                                      capture_files.read_capture(path, "t", ["amps"]).raw["amps"])
        long, one = _analyse(spool), _analyse(whole)
    finally:
        spool.close()
    assert long.sampling == one.sampling
    p_long, p_one = long.channels[0], one.channels[0]
    # Every compression event once, at the time the one-piece analysis finds it.
    assert p_long["events"] == p_one["events"] >= 15
    np.testing.assert_allclose(p_long["peak_times_s"], p_one["peak_times_s"], atol=2e-4)
    # Reference: scipy.signal.find_peaks on the whole signal, same prominence rule.
    si = cap.to_si(whole.raw["p1"], "pressure", "kPa", slope=250, offset=-125)
    swing = np.percentile(si, 99.9) - np.median(si)
    ref, _ = find_peaks(si, prominence=max(0.25 * swing, 6 * cap.noise_sd(si), 20.0),
                        distance=int(0.06 * RATE))
    assert ref.size == p_one["events"]
    # Heights and the intake stroke: the window's own crank degrees per sample set the fit.
    np.testing.assert_allclose(p_long["peaks_kpa"], p_one["peaks_kpa"], rtol=5e-3)
    assert p_long["settled_kpa"] == pytest.approx(p_one["settled_kpa"], rel=5e-3)
    assert p_long["intake_depression_kpa"] == pytest.approx(p_one["intake_depression_kpa"],
                                                            abs=0.3)
    assert p_long["crank_rpm"] == pytest.approx(p_one["crank_rpm"], rel=1e-3)
    # Vacuum: mean and 5-95 % pulsation exact (numpy.percentile is the reference).
    v_long, v_one = long.channels[1], one.channels[1]
    assert v_long == v_one
    smooth = cap.moving_average(whole.raw["vac"], int(RATE * 0.002))
    p5, p95 = np.percentile(smooth, [5, 95])
    assert v_long["pulsation_kpa"] == round(p95 - p5, 2)
    # Current: the same hump grid, heights and ranking.
    c_long, c_one = long.channels[2], one.channels[2]
    assert c_long["hump_times_s"] == c_one["hump_times_s"]
    assert c_long["hump_heights_a"] == c_one["hump_heights_a"]
    assert c_long["relative_pct"] == c_one["relative_pct"]
    assert [r.kind for r in long.readings] == [r.kind for r in one.readings]


def test_memory_follows_the_window_not_the_recording(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """tracemalloc peak of reading and analysing a 4x longer capture: nearly the same when
    spooled; about 4x when held whole (so the measure does see growth)."""
    short, long = _write(tmp_path / "short.csv", 6.0), _write(tmp_path / "long.csv", 24.0)

    def peak(run) -> int:  # noqa: ANN001 - a callable of no arguments
        tracemalloc.start()
        try:
            run()
            return tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()

    def spooled(path: Path) -> None:
        spool = _spool(path, monkeypatch, core=20_000, chunk=10_000)
        try:
            _analyse(spool)
            stream.check_levels(spool, "p1")
        finally:
            spool.close()

    def whole(path: Path) -> None:
        _analyse(capture_files.read_capture(path, "t", [c.column for c in CHANNELS],
                                            chunk_rows=10_000))

    spooled(short)  # warm imports and caches before measuring
    small, large = peak(lambda: spooled(short)), peak(lambda: spooled(long))
    held_small, held_large = peak(lambda: whole(short)), peak(lambda: whole(long))
    print(f"tracemalloc peak: spooled {small:,} -> {large:,} B; whole {held_small:,} -> "
          f"{held_large:,} B")
    assert large < 1.3 * small, (small, large)
    assert held_large > 3.0 * held_small, (held_small, held_large)
    assert large < held_large / 2


def test_long_capture_stored_and_read_back_in_blocks(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, engine) -> None:  # noqa: ANN001
    from fleetdb import ingest
    from tests.conftest import DATA

    ingest.import_files(engine, [DATA / "fleet.csv"])
    monkeypatch.setattr(stream, "CORE_SAMPLES", 15_000)
    monkeypatch.setattr(stream, "CORE_S", 0.0)
    monkeypatch.setattr(capture_files, "CHUNK_ROWS", 20_000)
    path = _write(tmp_path / "long.csv", 8.0)
    report = capture_store.capture_test(engine, path, "T-101", "2024-03-01 08:30", 1200,
                                        CHANNELS, firing_order=(1, 3, 4, 2),
                                        conditions={"throttle_open": "yes"}, by="tester")
    shown = capture_store.load_capture(engine, report.capture_id)
    back = capture_files.read_capture(path, "t", ["p1", "amps", "vac"])
    np.testing.assert_allclose(shown.time_s, back.time_s, atol=1e-3 / RATE)
    for col in ("p1", "amps", "vac"):
        span = float(np.ptp(back.raw[col]))
        np.testing.assert_allclose(shown.raw[col], back.raw[col], atol=1e-6 * span)
    with engine.connect() as conn:
        from sqlalchemy import text

        blocks = conn.execute(text("SELECT COUNT(*) FROM capture_block WHERE capture_id = :c"),
                              {"c": report.capture_id}).scalar()
    assert blocks == -(-back.time_s.size // 20_000)
    assert report.analysis.channels[0]["events"] >= 10


def test_time_and_level_checks_name_the_line_across_chunks(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    frame = _frame(6.0).copy()
    frame.loc[45_000, "t"] = frame.loc[44_999, "t"]  # time stands still, in a later chunk
    path = tmp_path / "bad.csv"
    frame.to_csv(path, index=False, float_format="%.9g")
    spool = _spool(path, monkeypatch, chunk=10_000)
    try:
        with pytest.raises(InvalidInput, match="line 45002, column t: time .* is not after"):
            _analyse(spool)
    finally:
        spool.close()
    frame = _frame(6.0).copy()
    frame.loc[[12_000, 12_001, 12_002, 39_998, 39_999, 40_000, 40_001], "amps"] = 2_000.0
    frame.to_csv(path, index=False, float_format="%.9g")
    spool = _spool(path, monkeypatch, chunk=10_000)  # the second run crosses a chunk edge
    try:
        with pytest.raises(InvalidInput, match="amps: is clipped at its top .* 4 samples, 2 "):
            _analyse(spool)
    finally:
        spool.close()


def test_idle_dip_found_window_by_window(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                         ) -> None:
    """40 s of idle vacuum with one leaking cylinder (capture_synth.idle_vacuum plants a
    4 kPa dip at place 2): the same place, dip and cycle count both ways; the firing
    frequency comes from the first window, so the pulsation's averaging may differ a little.
    """
    rng = np.random.default_rng(2)
    t, vac = synth.idle_vacuum(rate_hz=2_000, duration_s=40.0, rpm=750.0, cylinders=4,
                               mean_kpa=60.0, pulse_kpa=3.0, dip_kpa=4.0, dip_slot=2,
                               noise_kpa=0.3, rng=rng)
    path = tmp_path / "idle.csv"
    pd.DataFrame({"t": t, "map": vac}).to_csv(path, index=False, float_format="%.9g")
    monkeypatch.setattr(stream, "CORE_SAMPLES", 15_000)
    monkeypatch.setattr(stream, "CORE_S", 0.0)
    spool = stream.spool_capture(path, "t", ["map"], chunk_rows=7_000)
    channel = [parse_channel("map=vacuum_idle:kPa")]
    try:
        long, one = (capture_store.analyse(data, channel, cylinders=4, baro_kpa=101.325)
                     for data in (spool, spool.whole()))
    finally:
        spool.close()
    a, b = long.channels[0], one.channels[0]
    assert a["regular_dip"] and b["regular_dip"]
    assert a["dip_place"] == b["dip_place"] and a["cycles"] == b["cycles"] == 250
    assert a["dip_kpa"] == pytest.approx(4.0, abs=0.3)
    assert a["dip_kpa"] == pytest.approx(b["dip_kpa"], abs=0.05)
    assert a["mean_kpa"] == b["mean_kpa"]
    assert a["pulsation_kpa"] == pytest.approx(b["pulsation_kpa"], rel=0.02)
