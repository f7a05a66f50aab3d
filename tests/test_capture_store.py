"""Captures in the store (fleetdb.capture_store, fleetdb.capture_files, fleetdb capture).

A synthetic cranking capture (tests/capture_synth.py, physics described there) goes in as a
CSV; the test it writes must carry the derived readings through the normal validation,
feed the checks like typed readings, keep the capture, and leave the analysis when voided.
Real SQLite files and a real PostgreSQL server; no mocks.
"""

from __future__ import annotations

import functools
import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import capture_files, capture_store, frames, health, ingest
from fleetdb.capture_files import parse_channel
from fleetdb.cli import cli
from fleetdb.cli_capture import capture as capture_command
from fleetdb.errors import FleetDBError, InvalidInput, InvalidValue
from fleetdb.logbook import void_test
from tests import capture_synth as synth
from tests.conftest import DATA

RATE = 5_000


@functools.cache
def _recording(seed: int = 1, rate: int = RATE) -> pd.DataFrame:
    """Cylinder 1 pressure as transducer volts (250 kPa/V, -125 kPa offset), starter current,
    manifold vacuum while cranking (a restricted intake) and an unused trigger column."""
    sim = synth.simulate(synth.Geometry(), synth.Cranking(
        leak=(3e-4, 3e-4, 3e-3, 3e-4), intake_mean_kpa=10.0, intake_pulse_kpa=8.0,
        duration_s=3.0))
    rng = np.random.default_rng(seed)
    t, p1 = synth.sample(sim, rate, synth.pressure_gauge(sim, 1), 5.0, rng)
    _, amps = synth.sample(sim, rate, synth.starter_current(sim), 2.0, rng)
    _, vac = synth.sample(sim, rate, synth.manifold_vacuum(sim), 0.3, rng)
    return pd.DataFrame({"t": t, "p1": (p1 + 125.0) / 250.0, "amps": amps, "vac": vac,
                         "trigger": 0})


def write_capture(path: Path, frame: pd.DataFrame | None = None) -> Path:
    (frame if frame is not None else _recording()).to_csv(path, index=False,
                                                          float_format="%.9g")
    return path


CHANNELS = [parse_channel("p1=pressure:1:kPa"), parse_channel("amps=current"),
            parse_channel("vac=vacuum_cranking:kPa")]


def _channels() -> list[capture_files.Channel]:
    return capture_files.with_scales(CHANNELS, [capture_files.parse_scale("p1=250,-125")])


@pytest.fixture
def fleet(engine: Engine) -> Engine:
    ingest.import_files(engine, [DATA / "fleet.csv"])
    return engine


def test_capture_becomes_a_test_like_typed_readings(fleet: Engine, tmp_path: Path) -> None:
    path = write_capture(tmp_path / "crank.csv")
    report = capture_store.capture_test(
        fleet, path, "T-101", "2024-03-01 08:30", 1200, _channels(),
        firing_order=(1, 3, 4, 2), conditions={"throttle_open": "yes", "battery_v": "10.4"},
        by="tester")
    fr = frames.load(fleet)
    test = fr.tests.loc[report.test_id]
    assert test["source"] == "capture" and not test["voided"]
    assert test["crank_rpm"] == round(report.analysis.crank_rpm)
    readings = fr.readings[fr.readings["test_id"] == report.test_id]
    by_kind = {(k, None if pd.isna(c) else int(c)): v
               for k, c, v in zip(readings["kind"], readings["cylinder"], readings["value"],
                                  strict=True)}
    settled = report.analysis.channels[0]["settled_kpa"]
    assert by_kind[("compression", 1)] == pytest.approx(settled, abs=0.06)
    assert {c for k, c in by_kind if k == "relative"} == {1, 2, 3, 4}
    assert min((v, c) for (k, c), v in by_kind.items() if k == "relative")[1] == 3
    assert by_kind[("vacuum_cranking", None)] > 10.2  # 10 kPa held + pulses
    # The checks use the derived cranking vacuum with no special case (default D8).
    codes = [r["code"] for r in health.unit_report(fleet, "T-101")["reasons"]]
    assert "intake_restriction" in codes

    # The capture is kept: samples, channel map with scale and firing order, derivations.
    stored = capture_store.load_capture(fleet, report.capture_id)
    csv = pd.read_csv(path)
    assert stored.test_id == report.test_id and set(stored.raw) == {"p1", "amps", "vac"}
    for col in stored.raw:
        span = np.ptp(csv[col])
        np.testing.assert_allclose(stored.raw[col], csv[col], atol=1e-6 * span)
    np.testing.assert_allclose(stored.time_s, csv["t"], atol=1e-3 / RATE)
    np.testing.assert_allclose(stored.channel_si("p1"), 250 * csv["p1"] - 125, atol=1e-3)
    assert stored.channel_map["firing_order"] == "1-3-4-2"
    assert stored.channel_map["ignored_columns"] == ["trigger"]
    p1 = next(c for c in stored.channel_map["channels"] if c["column"] == "p1")
    assert (p1["slope"], p1["offset"], p1["cylinder"]) == (250.0, -125.0, 1)
    assert stored.derived["channels"][0]["events"] >= 4
    listed = capture_store.captures_of_test(fleet, report.test_id)
    assert [c["capture_id"] for c in listed] == [report.capture_id]
    assert listed[0]["stored_bytes"] < path.stat().st_size
    with fleet.connect() as conn:
        assert conn.execute(text("SELECT firing_order FROM firing_order")).scalars().all() == \
            ["1-3-4-2"]

    # Voiding the test takes what the capture gave out of the analysis; nothing is deleted.
    void_test(fleet, report.test_id, "transducer hose leaked", by="tester")
    fr = frames.load(fleet)
    assert fr.tests.loc[report.test_id, "voided"]
    assert (fr.readings["test_id"] == report.test_id).sum() == len(report.analysis.readings)
    codes = [r["code"] for r in health.unit_report(fleet, "T-101")["reasons"]]
    assert "intake_restriction" not in codes
    assert capture_store.load_capture(fleet, report.capture_id).test_id == report.test_id


def test_dry_run_writes_nothing_and_a_recording_is_kept_once(fleet: Engine,
                                                             tmp_path: Path) -> None:
    path = write_capture(tmp_path / "crank.csv")
    args = (fleet, path, "T-101", "2024-03-01 08:30", 1200, _channels())
    report = capture_store.capture_test(*args, firing_order=(1, 3, 4, 2), dry_run=True)
    assert report.test_id is None and report.analysis.readings
    with fleet.connect() as conn:
        for table in ("test", "reading", "capture", "capture_block", "firing_order"):
            assert conn.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar() == 0
    capture_store.capture_test(*args, firing_order=(1, 3, 4, 2))
    with pytest.raises(InvalidInput, match="already stored as capture 1 of test"):
        capture_store.capture_test(fleet, path, "T-101", "2024-03-02 08:30", 1210, _channels())


def test_firing_order_is_kept_for_the_family(fleet: Engine, tmp_path: Path) -> None:
    first = capture_store.capture_test(
        fleet, write_capture(tmp_path / "a.csv"), "T-101", "2024-03-01 08:30", 1200,
        _channels(), firing_order=(1, 3, 4, 2))
    assert first.firing_order_saved
    # T-102 shares the family: its capture finds the order without being told.
    second = capture_store.capture_test(
        fleet, write_capture(tmp_path / "b.csv", _recording(seed=2)), "T-102",
        "2024-03-01 09:30", 900, _channels())
    assert second.firing_order == (1, 3, 4, 2) and not second.firing_order_saved
    # A different order supersedes the old one; both rows stay.
    third = capture_store.capture_test(
        fleet, write_capture(tmp_path / "c.csv", _recording(seed=3)), "T-102",
        "2024-04-01 09:30", 950, _channels(), firing_order=(1, 2, 4, 3))
    assert third.firing_order_saved
    with fleet.connect() as conn:
        family = conn.execute(text("SELECT family_id FROM unit WHERE fleet_no = 'T-101'")).scalar()
        assert capture_store.stored_firing_order(conn, family) == (1, 2, 4, 3)
        assert conn.execute(text("SELECT COUNT(*) FROM firing_order")).scalar() == 2


# -- the file -------------------------------------------------------------------------------

def test_reading_in_chunks_gives_the_same_samples(tmp_path: Path) -> None:
    path = write_capture(tmp_path / "crank.csv")
    seen: list[tuple[int, int]] = []
    small = capture_files.read_capture(path, "t", ["p1", "amps"], chunk_rows=997,
                                       progress=lambda done, total: seen.append((done, total)))
    whole = capture_files.read_capture(path, "t", ["p1", "amps"])
    np.testing.assert_array_equal(small.time_s, whole.time_s)
    for col in ("p1", "amps"):
        np.testing.assert_array_equal(small.raw[col], whole.raw[col])
    assert small.sha256 == whole.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert small.ignored == ["vac", "trigger"]
    done = [d for d, _ in seen]
    assert done == sorted(done) and seen[-1] == (path.stat().st_size, path.stat().st_size)
    ms = capture_files.read_capture(path, "t", ["p1"], time_unit="ms")
    np.testing.assert_allclose(ms.time_s, whole.time_s * 1e-3)


def test_unreadable_files(tmp_path: Path) -> None:
    for content, message in ((b"", "file is empty"), (b"t,p\x001\n0,1\n", "NUL bytes"),
                             (b"t,p1\n\xff\xfe,1\n", "not UTF-8"),
                             (b"t,p1\n" + b"0,1\n" * 20000 + b"\xff,1\n", "not UTF-8"),
                             (b"t,p1\n0,1\n0.1\n", "line 3, column p1: blank cell"),
                             (b"t,p1\n", "holds no samples"),
                             (b"t,p1\n0,1\n0.1,\n", "line 3, column p1: blank cell")):
        path = tmp_path / "x.csv"
        path.write_bytes(content)
        with pytest.raises(InvalidInput, match=message):
            capture_files.read_capture(path, "t", ["p1"])


def test_samples_round_trip_and_keep_their_precision() -> None:
    t = np.arange(2000) / 1e4
    raw = {"fine": 1000.0 + np.arange(2000) * 1e-7, "volts": np.sin(t * 50)}
    blob = capture_store.encode_samples(t, raw)
    time_back, raw_back = capture_store.decode_samples(blob)
    np.testing.assert_allclose(time_back, t, atol=1e-3 / 1e4)
    np.testing.assert_array_equal(raw_back["fine"], raw["fine"])  # float32 would lose it
    np.testing.assert_allclose(raw_back["volts"], raw["volts"], atol=1e-6 * 2)
    jitter = t + np.where(np.arange(2000) % 2, 0.0, 2e-6)  # 2 % of a step: kept in full
    time_back, _ = capture_store.decode_samples(capture_store.encode_samples(jitter, raw))
    np.testing.assert_array_equal(time_back, jitter)


@pytest.mark.parametrize(("spec", "expected"), [
    ("p3=pressure:3:psi", ("p3", "pressure", 3, "psi", False)),
    ("p3 = pressure:3", ("p3", "pressure", 3, "kPa", False)),
    ("map=vacuum_idle:kPa-abs", ("map", "vacuum_idle", None, "kPa", True)),
    ("v=vacuum-cranking:inhg", ("v", "vacuum_cranking", None, "inHg", False)),
    ("a:b=current", ("a:b", "current", None, "A", False)),
])
def test_channel_specs(spec: str, expected: tuple) -> None:
    ch = parse_channel(spec)
    assert (ch.column, ch.kind, ch.cylinder, ch.unit, ch.absolute) == expected


@pytest.mark.parametrize(("spec", "message"), [
    ("p3", "write COLUMN=KIND"), ("p3=torque", "not a channel kind"),
    ("p3=pressure:psi", "say which cylinder"), ("v=vacuum_idle:psi", "does not fit"),
    ("a=current:mV", "in A"), ("v=vacuum_idle:inHg-abs", "does not fit"),
])
def test_bad_channel_specs(spec: str, message: str) -> None:
    with pytest.raises(InvalidValue, match=message):
        parse_channel(spec)


def test_scales_and_firing_orders() -> None:
    assert capture_files.parse_scale("p1=250,-125") == ("p1", 250.0, -125.0)
    assert capture_files.parse_scale("p1=0.5") == ("p1", 0.5, 0.0)
    for bad in ("p1=", "p1=a,b", "p1=0,1", "=1,2"):
        with pytest.raises(InvalidValue):
            capture_files.parse_scale(bad)
    with pytest.raises(InvalidValue, match="not a mapped channel"):
        capture_files.with_scales(CHANNELS, [("p9", 1.0, 0.0)])
    assert capture_files.parse_firing_order("1-5-3-6-2-4", 6) == (1, 5, 3, 6, 2, 4)
    with pytest.raises(InvalidValue, match="exactly once"):
        capture_files.parse_firing_order("1-3-3-2", 4)


# -- the command ----------------------------------------------------------------------------

def run(args: list[str], db: str, code: int = 0) -> str:
    result = CliRunner().invoke(capture_command, [*args, "--db", db], catch_exceptions=False)
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output
    return result.output


BASE = ["--unit", "T-101", "--at", "2024-03-01 08:30", "--hours", "1200"]
FULL = [*BASE, "--channel", "p1=pressure:1:kPa", "--scale", "p1=250,-125",
        "--channel", "amps=current", "--channel", "vac=vacuum_cranking",
        "--firing-order", "1-3-4-2", "--throttle-open"]


@pytest.fixture
def store(sqlite_url: str) -> str:
    CliRunner().invoke(cli, ["init", "--db", sqlite_url], catch_exceptions=False)
    CliRunner().invoke(cli, ["import", str(DATA / "fleet.csv"), "--db", sqlite_url],
                       catch_exceptions=False)
    return sqlite_url


def test_cli_capture_text_and_json(store: str, tmp_path: Path) -> None:
    path = write_capture(tmp_path / "crank.csv")
    out = run([str(path), *FULL, "--dry-run"], store)
    assert out.startswith(f"Checked {path} for T-101 (dry run, nothing written)")
    assert "p1: pressure of cylinder 1, kPa gauge, value = 250 x raw - 125" in out
    assert "Finding (intake_depression_deep)" in out
    data = json.loads(run([str(path), *FULL, "--json"], store))
    assert set(data) == {"file", "fleet_no", "test_id", "capture_id", "dry_run", "samples",
                         "sample_rate_hz", "duration_s", "file_bytes", "stored_bytes",
                         "firing_order", "firing_order_saved", "crank_rpm", "conditions",
                         "readings", "channels", "findings"}
    assert data["test_id"] == 1 and data["sample_rate_hz"] == pytest.approx(RATE)
    assert data["conditions"] == {"crank_rpm": str(round(data["crank_rpm"])),
                                  "throttle_open": "yes"}
    assert {r["kind"] for r in data["readings"]} == {"compression", "relative",
                                                     "vacuum_cranking"}
    unit = json.loads(CliRunner().invoke(cli, ["unit", "T-101", "--json", "--db", store]).output)
    assert unit["tests"][0]["source"] == "capture"


def _frame_with(**changes: object) -> pd.DataFrame:
    frame = _recording().copy()
    for col, value in changes.items():
        frame[col] = value
    return frame


def _bad_cells() -> pd.DataFrame:
    frame = _recording()[["t", "p1"]].astype(object)
    frame.loc[3, "p1"] = "abc"  # line 5 of the file
    return frame


def _back_in_time() -> pd.DataFrame:
    frame = _recording().copy()
    frame.loc[10, "t"] = frame.loc[9, "t"]
    return frame


def _pressure_kpa() -> np.ndarray:
    return 250.0 * _recording()["p1"].to_numpy() - 125.0


@pytest.mark.parametrize(("frame", "args", "message"), [
    (lambda: _recording().rename(columns={"t": "time"}), [],
     "column t: time column not in the file (name it with --time-column); its columns are "
     "time, p1, amps, vac, trigger"),
    (_bad_cells, [], "line 5, column p1: 'abc' is not a number"),
    (_back_in_time, [], "line 12, column t: time 0.0018 s is not after 0.0018 s"),
    (lambda: _frame_with(p1=0.5), [], "column p1: is flat: every sample reads 0.5"),
    (lambda: _frame_with(p1=(np.minimum(_pressure_kpa(), 1000.0) + 125) / 250), [],
     "column p1: is clipped at its top"),
    (lambda: _recording().iloc[:3000], [], "column p1: holds 1 whole compression event(s)"),
    (lambda: _recording().iloc[::20], [], "column p1: sample rate 250 Hz is too low for "
     "cranking at"),
    (None, ["--scale", "p1=25000,0"], "column p1: settles at"),
    (None, ["--channel", "vac=pressure:7"], "column vac: cylinder 7 on a 4-cylinder engine"),
])
def test_cli_capture_errors_name_file_line_and_column(store: str, tmp_path: Path, frame,
                                                      args: list[str], message: str) -> None:
    path = write_capture(tmp_path / "bad.csv", None if frame is None else frame())
    cols = ["--channel", "p1=pressure:1:kPa", "--scale", "p1=250,-125"]
    if "--scale" in args:
        cols = ["--channel", "p1=pressure:1:kPa"]
    if "--channel" in args:
        cols = []
        args = [*args, "--channel", "p1=pressure:1"]
    out = run([str(path), *BASE, *cols, *args], store, code=1)
    assert "nothing written" in out
    assert message in out
    assert str(path) in out


@pytest.mark.parametrize(("args", "message"), [
    (["--channel", "amps=current"], "column amps: a current channel needs the engine family's "
     "firing order"),
    (["--channel", "amps=current", "--firing-order", "1-3-4-2"], "column amps: the current "
     "humps need a sync"),
    (["--channel", "p1=pressure:1", "--channel", "vac=pressure:1"], "column vac: cylinder 1's "
     "pressure is also mapped to column p1"),
])
def test_cli_capture_channel_map_errors(store: str, tmp_path: Path, args: list[str],
                                        message: str) -> None:
    path = write_capture(tmp_path / "crank.csv")
    out = run([str(path), *BASE, *args], store, code=1)
    assert message in out


@pytest.mark.parametrize(("args", "message"), [
    (["--channel", "p1=volts"],
     "Invalid value for --channel: 'p1=volts': 'volts' is not a channel kind"),
    (["--channel", "p1=pressure:1", "--scale", "p1=x"],
     "Invalid value for --scale: 'p1=x': write COLUMN=SLOPE,OFFSET"),
    (["--channel", "amps=current", "--firing-order", "1-2-2-4"],
     "Invalid value for --firing-order: '1-2-2-4' must name each cylinder 1 to 4 exactly"),
])
def test_cli_capture_bad_options(store: str, tmp_path: Path, args: list[str],
                                 message: str) -> None:
    path = write_capture(tmp_path / "crank.csv")
    out = run([str(path), *BASE, *args], store, code=2)
    assert message in out


def test_cli_capture_unknown_unit_and_repeated_test(store: str, tmp_path: Path) -> None:
    path = write_capture(tmp_path / "crank.csv")
    out = run([str(path), *FULL[:1], "T-999", *FULL[2:]], store, code=1)
    assert "no unit with fleet number 'T-999'" in out
    run([str(path), *FULL], store)
    again = write_capture(tmp_path / "again.csv", _recording(seed=5))
    out = run([str(again), *FULL], store, code=1)
    assert "again.csv (derived readings)" in out and "already has a test" in out


def test_library_refuses_a_wrong_length_firing_order(fleet: Engine, tmp_path: Path) -> None:
    with pytest.raises(FleetDBError, match="does not name the 4 cylinders"):
        capture_store.capture_test(fleet, write_capture(tmp_path / "c.csv"), "T-101",
                                   "2024-03-01 08:30", 1200, _channels(),
                                   firing_order=(1, 2, 3))
