"""Captures on the dashboard, in-process: the unit page's capture panel and the Log page's
upload, channel map, preview and save, against a real SQLite store.

The capture is tests/test_capture_store.py's physics-based synthetic recording (cylinder 1
pressure as transducer volts, starter current with a weak cylinder 3, cranking vacuum with
a restricted intake); the callbacks are driven through Flask's test client as the browser
drives them. What the panels show is checked against fleetdb's own derivations and against
the synthetic engine's ground truth (tests/capture_synth.py).
"""

from __future__ import annotations

import base64
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import text

from dashboard import capture_data, capture_figures, create_app, data, ids
from fleetdb import capture, capture_store, db
from tests import capture_synth as synth
from tests.test_capture_store import _channels, _recording, write_capture
from tests.test_dashboard_app import _callback, _walk, store_url  # noqa: F401 (fixture)

FORM = {"fleet_no": "T-101", "tested_at": "2024-07-01 08:30", "hours": "1300",
        "conditions": {"battery_v": "10.4", "throttle_open": "yes", "technician": "QA"}}


@pytest.fixture
def client(store_url: str) -> Any:  # noqa: F811
    return create_app(store_url, auth=False).server.test_client()


@pytest.fixture
def stored(store_url: str, tmp_path: Path) -> capture_store.CaptureReport:  # noqa: F811
    """The synthetic capture logged for T-101 through the library (as ``fleetdb capture``)."""
    return capture_store.capture_test(
        db.get_engine(store_url), write_capture(tmp_path / "crank.csv"), "T-101",
        "2024-07-01 08:30", 1300, _channels(), firing_order=(1, 3, 4, 2),
        conditions={"throttle_open": "yes", "battery_v": "10.4"}, by="tester")


def _post(client: Any, output_id: str, inputs: list[dict[str, Any]],
          state: list[dict[str, Any]] | None = None, changed: str | None = None) -> Any:
    """POST one callback as the renderer does; return the JSON reply."""
    changed = changed or f"{inputs[0]['id']}.{inputs[0]['property']}"
    dep = _callback(client, output_id, changed)
    parts = dep["output"].strip(".").split("...")
    outputs = [{"id": p.rsplit(".", 1)[0], "property": p.rsplit(".", 1)[1]} for p in parts]
    body = {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": inputs, "state": state or [],
            "changedPropIds": [changed]}
    reply = client.post("/_dash-update-component", json=body)
    assert reply.status_code in (200, 204), reply.data[:800]
    return reply.get_json() if reply.status_code == 200 else None


# -- display envelope (fleetdb.capture.envelope) -------------------------------------------------

def _plain_envelope(x: np.ndarray, size: int) -> tuple[float, float, set[int]]:
    """An independent reference: a Python loop over the buckets (min, max, picked indices)."""
    picked = set()
    for start in range(0, x.size, size):
        block = x[start:start + size]
        picked |= {start + int(np.argmin(block)), start + int(np.argmax(block))}
    return float(x.min()), float(x.max()), picked


def test_envelope_keeps_every_bucket_extreme() -> None:
    rng = np.random.default_rng(3)
    t = np.arange(1_000_003) / 50_000.0
    x = np.sin(2 * np.pi * 3 * t) + rng.normal(0, 0.1, t.size)
    x[777_777] = 9.0  # one narrow spike must survive the thinning
    tt, xx = capture.envelope(t, x, buckets=1000)
    assert xx.size <= 2 * 1000 + 2 and np.all(np.diff(tt) > 0)
    size = -(-t.size // 1000)
    lo, hi, picked = _plain_envelope(x, size)
    assert (xx.min(), xx.max()) == (lo, hi) and 9.0 in xx
    assert set(np.searchsorted(t, tt)) == picked


def test_envelope_window_is_full_resolution_when_short() -> None:
    t = np.arange(100_000) / 10_000.0
    x = np.cos(t)
    tt, xx = capture.envelope(t, x, start_s=2.0, end_s=2.1, buckets=2000)
    inside = (t >= 2.0) & (t <= 2.1)
    # Every sample of the window, and one either side so the line reaches the edges.
    assert tt.size == inside.sum() + 2 and tt[0] < 2.0 < 2.1 < tt[-1]
    np.testing.assert_array_equal(xx[1:-1], x[inside])


# -- what fleetdb keeps for the figures ----------------------------------------------------------

def test_derived_detail_matches_the_synthetic_engine(stored: capture_store.CaptureReport) -> None:
    pressure = stored.analysis.channels[0]
    sim = synth.simulate(synth.Geometry(), synth.Cranking(
        leak=(3e-4, 3e-4, 3e-3, 3e-4), intake_mean_kpa=10.0, intake_pulse_kpa=8.0,
        duration_s=3.0))
    times = np.asarray(pressure["peak_times_s"])
    truth = [sim.rpm_between(a, b) for a, b in zip(times[:-1], times[1:], strict=True)]
    # Cranking speed over each cycle: the simulated crank angle's own mean speed (within 1 %).
    np.testing.assert_allclose(pressure["rpm_by_cycle"], truth, rtol=0.01)
    # Each cycle's intake depression: the model holds 10 kPa plus an 8 kPa pulse at the
    # fastest piston speed (tests/capture_synth.py), seen through the 30° average.
    depth = np.asarray(pressure["depression_by_cycle_kpa"])
    assert depth.size == times.size - 1 and np.all((depth > 12.0) & (depth < 19.0))
    current = next(c for c in stored.analysis.channels if c["kind"] == "current")
    assert set(current["hump_cylinders"]) == {1, 2, 3, 4}
    assert len(current["rpm_by_hump"]) == len(current["hump_times_s"]) - 1
    assert np.median(current["rpm_by_hump"]) == pytest.approx(pressure["crank_rpm"], rel=0.03)


def test_captures_of_unit_lists_the_stored_capture(store_url: str,  # noqa: F811
                                                   stored: capture_store.CaptureReport) -> None:
    rows = capture_data.captures_of_unit(store_url, "T-101")
    assert [(r["capture_id"], r["test_id"], r["voided"]) for r in rows] == [
        (stored.capture_id, stored.test_id, False)]
    assert {c["column"] for c in rows[0]["channels"]} == {"p1", "amps", "vac"}
    assert capture_data.captures_of_unit(store_url, "T-102") == []
    assert "crank.csv" in capture_data.capture_label(rows[0])


# -- Unit history ----------------------------------------------------------------------------------

def test_unit_page_offers_the_capture_and_shows_it(client: Any,
                                                   stored: capture_store.CaptureReport) -> None:
    reply = _post(client, ids.UNIT_CAPTURE_PICK,
                  [{"id": ids.UNIT_PICK, "property": "value", "value": "T-101"}],
                  [{"id": ids.UNIT_CAPTURE_PICK, "property": "value", "value": None}])
    out = reply["response"]
    assert out[ids.UNIT_CAPTURE_PANEL]["hidden"] is False
    assert out[ids.UNIT_CAPTURE_PICK]["value"] == stored.capture_id
    none = _post(client, ids.UNIT_CAPTURE_PICK,
                 [{"id": ids.UNIT_PICK, "property": "value", "value": "T-102"}],
                 [{"id": ids.UNIT_CAPTURE_PICK, "property": "value", "value": None}])
    assert none["response"][ids.UNIT_CAPTURE_PANEL]["hidden"] is True

    pick = [{"id": ids.UNIT_CAPTURE_PICK, "property": "value", "value": stored.capture_id},
            {"id": ids.UNIT_PRESSURE_UNIT, "property": "value", "value": "kPa"}]
    described = _post(client, ids.UNIT_CAPTURE_SUMMARY, pick)["response"]
    words = " ".join(str(n["props"].get("children")) for n in
                     _walk(described[ids.UNIT_CAPTURE_SUMMARY]["children"]))
    pressure = stored.analysis.channels[0]
    assert f"{pressure['events']} compression events" in words
    assert f"settled {pressure['settled_kpa']:.1f} kPa" in words
    assert "intake_depression_deep" in words  # fleetdb's finding on the restricted intake
    events = described[ids.UNIT_CAPTURE_EVENTS]["figure"]
    peaks = next(t for t in events["data"] if t["name"] == "cyl 1 peaks")
    np.testing.assert_allclose(_flat(peaks["y"]), pressure["peaks_kpa"])


def _flat(values: Any) -> np.ndarray:
    """A trace's x or y as plotly JSON gives it (a list, or a typed-array mapping)."""
    if isinstance(values, dict):  # {"dtype": "f8", "bdata": base64}
        return np.frombuffer(base64.b64decode(values["bdata"]), dtype=values["dtype"])
    return np.asarray(values, dtype=float)


def test_waveform_marks_events_and_zoom_redraws_at_full_resolution(
        client: Any, store_url: str, stored: capture_store.CaptureReport) -> None:  # noqa: F811
    picked = [{"id": ids.UNIT_CAPTURE_PICK, "property": "value", "value": stored.capture_id},
              {"id": ids.UNIT_PRESSURE_UNIT, "property": "value", "value": "kPa"}]
    relayout = {"id": ids.UNIT_CAPTURE_WAVEFORM, "property": "relayoutData", "value": None}
    fig = _post(client, ids.UNIT_CAPTURE_WAVEFORM, picked, [relayout])["response"][
        ids.UNIT_CAPTURE_WAVEFORM]["figure"]
    channels = fig["data"][:3]
    assert [c["name"] for c in channels] == ["cyl 1 pressure (p1)", "starter current (amps)",
                                             "cranking vacuum (vac)"]  # the map's order
    samples = len(_recording())
    assert all(_flat(c["x"]).size <= 2 * capture_data.DISPLAY_BUCKETS + 2 for c in channels)
    assert samples > 2 * capture_data.DISPLAY_BUCKETS  # so it was thinned
    # The highest sample of the recording survives the thinning (kPa = 250 x volts - 125).
    raw = _recording()
    assert _flat(channels[0]["y"]).max() == pytest.approx(250 * raw["p1"].max() - 125, abs=1e-3)
    marked = next(t for t in fig["data"] if t["name"] == "cyl 1 compression events")
    np.testing.assert_allclose(_flat(marked["x"]),
                               stored.analysis.channels[0]["peak_times_s"])
    assert fig["layout"]["uirevision"] == stored.capture_id

    # Zooming is a callback of its own (so that the graph's first relayout event can never
    # drop the drawing above): the picked capture and unit are its state.
    relayout["value"] = {"xaxis.range[0]": 1.0, "xaxis.range[1]": 1.1}
    patched = _post(client, ids.UNIT_CAPTURE_WAVEFORM, [relayout], picked)
    ops = next(iter(patched["response"][ids.UNIT_CAPTURE_WAVEFORM].values()))["operations"]
    xs = {op["location"][1]: op["params"]["value"] for op in ops if op["location"][-1] == "x"}
    window = raw["t"][(raw["t"] >= 1.0) & (raw["t"] <= 1.1)]
    assert sorted(xs) == [0, 1, 2]
    assert len(xs[0]) == window.size + 2  # every sample of the window, at full resolution
    # A y-only zoom, or the graph's first autosize, does not redraw.
    for event in ({"yaxis.range[0]": 0, "yaxis.range[1]": 10}, {"autosize": True}):
        relayout["value"] = event
        unchanged = _post(client, ids.UNIT_CAPTURE_WAVEFORM, [relayout], picked)
        assert unchanged is None or unchanged["response"] == {}  # dash.no_update


@pytest.mark.parametrize(("relayout", "window"), [
    ({"xaxis.range[0]": 0.5, "xaxis.range[1]": 0.75}, (0.5, 0.75)),
    ({"xaxis2.range[0]": 1, "xaxis2.range[1]": 2, "xaxis.range[0]": 1}, (1.0, 2.0)),
    ({"xaxis3.range": [0.1, 0.2]}, (0.1, 0.2)),
    ({"xaxis.autorange": True}, (None, None)),
    ({"yaxis.range[0]": 0, "yaxis.range[1]": 3}, None),
    ({"autosize": True}, None),
    (None, None),
])
def test_zoom_window_reads_plotly_relayout(relayout: Any, window: Any) -> None:
    assert capture_data.zoom_window(relayout) == window


def test_events_figure_without_pressure_uses_the_current_humps() -> None:
    derived = {"crank_rpm": 190.0, "channels": [{
        "kind": "current", "column": "amps", "cylinder": None, "hump_times_s": [0.1, 0.25, 0.4],
        "rpm_by_hump": [200.0, 200.0]}]}
    fig = capture_figures.events(derived, "psi")
    speed = [t for t in fig.data if t.name == "speed from current humps"]
    assert len(speed) == 1 and list(speed[0].y) == [200.0, 200.0]
    assert "No cylinder pressure" in capture_figures.events({"channels": []}, "psi") \
        .layout.annotations[0].text


# -- Log a test: upload, map, preview, save --------------------------------------------------------

def _data_url(raw: bytes) -> str:
    return "data:text/csv;base64," + base64.b64encode(raw).decode()


def _form(upload: dict[str, Any], roles: dict[str, dict[str, Any]],
          **changes: Any) -> capture_data.CaptureForm:
    rows = [{"role": "ignore", "unit": None, "cylinder": None, "slope": None, "offset": None,
             **roles.get(c, {})} for c in upload["columns"]]
    entry = data.FormEntry(fleet_no=FORM["fleet_no"], tested_at=FORM["tested_at"],
                           hours=FORM["hours"], kind="compression", pressure_unit="psi",
                           cylinders={}, conditions=dict(FORM["conditions"]))
    values = {"upload": upload, "rows": rows, "entry": entry, "firing_order": "1-3-4-2"}
    values.update(changes)
    return capture_data.CaptureForm(**values)


ROLES = {"t": {"role": "time", "unit": "s"},
         "p1": {"role": "pressure", "cylinder": "1", "unit": "kPa", "slope": "250",
                "offset": "-125"},
         "amps": {"role": "current", "unit": "A"},
         "vac": {"role": "vacuum_cranking", "unit": "kPa"}}


def test_upload_keeps_the_file_and_offers_its_columns(client: Any, tmp_path: Path) -> None:
    raw = write_capture(tmp_path / "crank.csv").read_bytes()
    reply = _post(client, ids.LOG_CAPTURE_KEY,
                  [{"id": ids.LOG_CAPTURE_UPLOAD, "property": "contents",
                    "value": _data_url(raw)}],
                  [{"id": ids.LOG_CAPTURE_UPLOAD, "property": "filename",
                    "value": "crank.csv"}])["response"]
    kept = reply[ids.LOG_CAPTURE_KEY]["data"]
    assert kept["columns"] == ["t", "p1", "amps", "vac", "trigger"] and kept["size"] == len(raw)
    assert set(kept) == {"token", "name", "size", "columns"}  # a key, never the samples
    rows = [n for n in _walk(reply[ids.LOG_CAPTURE_MAP]["children"])
            if n["props"].get("className") == "map-row"]
    assert [r["props"]["data-column"] for r in rows] == kept["columns"]
    roles = [n["props"]["value"] for n in _walk(reply[ids.LOG_CAPTURE_MAP]["children"])
             if isinstance(n["props"].get("id"), dict)
             and n["props"]["id"]["type"] == "log-capture-role"]
    assert roles == ["time", "ignore", "ignore", "ignore", "ignore"]


def test_upload_over_the_limit_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(capture_data, "MAX_UPLOAD_BYTES", 1000)
    with pytest.raises(capture_data.InvalidInput) as caught:
        capture_data.receive_upload(_data_url(b"t,p1\n" + b"0.1,2\n" * 400), "big.csv")
    assert "fleetdb capture FILE" in caught.value.problems[0].message


def test_preview_derives_what_the_cli_derives_and_writes_nothing(
        store_url: str, tmp_path: Path) -> None:  # noqa: F811
    path = write_capture(tmp_path / "crank.csv")
    upload = capture_data.receive_upload(_data_url(path.read_bytes()), "crank.csv").to_store()
    before = _counts(store_url)
    outcome = capture_data.preview(store_url, _form(upload, ROLES))
    assert outcome.problems == [] and _counts(store_url) == before
    cli = capture_store.capture_test(db.get_engine(store_url), path, "T-101", FORM["tested_at"],
                                     FORM["hours"], _channels(), firing_order=(1, 3, 4, 2),
                                     conditions=FORM["conditions"], dry_run=True)
    assert outcome.report["readings"] == cli.as_dict()["readings"]
    assert outcome.report["file"] == "crank.csv"  # named as uploaded, not the server's path
    np.testing.assert_allclose(outcome.shown.channel_si("p1"),
                               250 * pd.read_csv(path)["p1"] - 125)


def _counts(url: str) -> tuple[int, int, int]:
    with db.get_engine(url).connect() as conn:
        return tuple(int(conn.execute(text(f"SELECT COUNT(*) FROM {t}")).scalar_one())
                     for t in ("test", "reading", "capture"))


@pytest.mark.parametrize(("roles", "changes", "where", "words"), [
    ({**ROLES, "t": {"role": "ignore"}}, {}, "Channel map", "mark exactly one column as time"),
    ({**ROLES, "p1": {**ROLES["p1"], "cylinder": ""}}, {}, "Column p1", "say which cylinder"),
    ({**ROLES, "p1": {**ROLES["p1"], "cylinder": "7"}}, {}, "crank.csv, column p1",
     "cylinder 7 on a 4-cylinder engine"),
    ({**ROLES, "p1": {**ROLES["p1"], "slope": "zero"}}, {}, "Column p1",
     "write COLUMN=SLOPE,OFFSET"),
    ({"t": ROLES["t"]}, {}, "Channel map", "map at least one column"),
    (ROLES, {"firing_order": "1-3-3-2"}, "Firing order", "exactly once"),
    (ROLES, {"firing_order": ""}, "crank.csv, column amps", "needs the engine family's firing"),
    # Seconds read as milliseconds: 3 s of cranking shrinks to 3 ms.
    ({**ROLES, "t": {"role": "time", "unit": "ms"}}, {}, "crank.csv, column p1",
     "two or more are needed"),
])
def test_bad_map_is_refused_with_its_place_and_nothing_written(
        store_url: str, tmp_path: Path, roles: dict[str, Any], changes: dict[str, Any],  # noqa: F811
        where: str, words: str) -> None:
    path = write_capture(tmp_path / "crank.csv")
    upload = capture_data.receive_upload(_data_url(path.read_bytes()), "crank.csv").to_store()
    before = _counts(store_url)
    outcome = capture_data.save(store_url, _form(upload, roles, **changes))
    assert outcome.report is None and _counts(store_url) == before
    assert any(p.where == where and words in p.message for p in outcome.problems), \
        outcome.problems


def test_bad_line_in_the_file_is_named_by_line_and_column(store_url: str,  # noqa: F811
                                                          tmp_path: Path) -> None:
    lines = write_capture(tmp_path / "crank.csv").read_text().splitlines()
    lines[41] = lines[41].replace(",", ",x", 1)
    upload = capture_data.receive_upload(_data_url(("\n".join(lines) + "\n").encode()),
                                         "crank.csv").to_store()
    outcome = capture_data.preview(store_url, _form(upload, ROLES))
    cell = "x" + lines[41].split(",x")[1].split(",")[0]
    assert [(p.where, p.message) for p in outcome.problems] == [
        ("crank.csv, line 42, column p1",
         f"{cell!r} is not a number (decimals are written with a point)")]


def test_save_logs_the_test_like_the_cli_and_keeps_the_capture(
        store_url: str, tmp_path: Path) -> None:  # noqa: F811
    path = write_capture(tmp_path / "crank.csv")
    upload = capture_data.receive_upload(_data_url(path.read_bytes()), "crank.csv").to_store()
    outcome = capture_data.save(store_url, _form(upload, ROLES))
    assert outcome.problems == []
    report = outcome.report
    assert report["test_id"] is not None and outcome.verdict["test_id"] == report["test_id"]
    with db.get_engine(store_url).connect() as conn:
        source, by = conn.execute(text("SELECT source, created_by FROM test WHERE id = :t"),
                                  {"t": report["test_id"]}).one()
        name = conn.execute(text("SELECT file_name FROM capture WHERE id = :c"),
                            {"c": report["capture_id"]}).scalar_one()
    assert (source, by, name) == ("capture", "QA", "crank.csv")
    again = capture_data.save(store_url, _form(upload, ROLES))
    assert "already stored as capture" in again.problems[0].message


def test_changing_the_unit_keeps_the_zoomed_window_at_full_resolution(
        client: Any, stored: capture_store.CaptureReport) -> None:
    inputs = [{"id": ids.UNIT_CAPTURE_PICK, "property": "value", "value": stored.capture_id},
              {"id": ids.UNIT_PRESSURE_UNIT, "property": "value", "value": "psi"}]
    relayout = [{"id": ids.UNIT_CAPTURE_WAVEFORM, "property": "relayoutData",
                 "value": {"xaxis.range[0]": 2.0, "xaxis.range[1]": 2.2}}]
    fig = _post(client, ids.UNIT_CAPTURE_WAVEFORM, inputs, relayout,
                changed=f"{ids.UNIT_PRESSURE_UNIT}.value")["response"][
        ids.UNIT_CAPTURE_WAVEFORM]["figure"]
    t = _recording()["t"]
    assert _flat(fig["data"][0]["x"]).size == ((t >= 2.0) & (t <= 2.2)).sum() + 2
    assert "psi gauge" in str(fig["layout"]["annotations"])
