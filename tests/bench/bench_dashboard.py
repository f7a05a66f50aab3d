"""Dashboard benchmark: the Health board's callbacks on a large synthetic fleet, and in a browser.

On the synthetic fleet of :mod:`tests.bench.synth` (20,000 units at full scale, 300 with
``--small``), imported once into a SQLite file that later runs reuse, and refreshed with
``fleetdb.health.refresh_fleet`` for a day just after its last test:

* **server**: each Health board callback POSTed to ``/_dash-update-component`` through
  ``app.server.test_client()`` exactly as the browser sends it (first load, a filter, the
  next page, the last page, a fleet-number search, the CSV export, and the Unit history's
  report). Beside each, the baseline measured in the same run: the ``fleetdb.health.board``
  call alone that the callback makes (what Dash and the table formatting add on top).
* **browser**: Playwright driving Debian's Chromium against the app served in-process:
  first load of ``/`` to the table's rows drawn, a page change and a level filter, each
  to the new rows drawn (skipped with the reason when Chromium or playwright is missing).

Goals: under 300 ms median per callback, under 2 s for the first load in the browser.
Speed is reported, never asserted. Results print as a table and go to
``tests/bench/out/dashboard-*.json`` (git-ignored).

Run by hand::

    python -m tests.bench.bench_dashboard            # 20,000 units (first run imports: minutes)
    python -m tests.bench.bench_dashboard --small    # 300 units
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import logging
import os
import statistics
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from tests.bench import synth

REPO = Path(__file__).resolve().parents[2]
OUT = Path(__file__).resolve().parent / "out"
FULL_UNITS = 20_000
SMALL_UNITS = 300
SEED = 1
GOAL_CALLBACK_MS = 300.0
GOAL_FIRST_LOAD_MS = 2000.0
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--host-resolver-rules=MAP * ~NOTFOUND , EXCLUDE localhost , EXCLUDE 127.0.0.1",
]


# -- the store ------------------------------------------------------------------------------

def prepare_store(n_units: int, seed: int = SEED) -> tuple[str, dict[str, Any]]:
    """The synthetic fleet in a SQLite file, imported once and reused by later runs.

    The import runs in a child process (its memory is its own); a ``.done`` file beside
    the database records a finished import, so an interrupted one is redone.

    :returns: the database URL and what preparing it took.
    """
    from fleetdb import migrate

    folder = OUT / "data" / f"synth-{n_units}u-seed{seed}"
    paths = synth.write_fleet(folder, n_units, seed)
    path = OUT / "data" / f"dashboard-synth-{n_units}u-seed{seed}.sqlite"
    done = path.with_suffix(".done")
    url = f"sqlite:///{path}"
    info: dict[str, Any] = {"database": str(path.relative_to(REPO)), "reused": done.exists(),
                            **synth.read_manifest(folder)}
    if done.exists():
        migrate.upgrade(url)  # a store kept from an older schema: bring it to head
    else:
        for stale in (path, path.with_name(path.name + "-wal"), path.with_name(path.name
                                                                               + "-shm")):
            stale.unlink(missing_ok=True)
        migrate.upgrade(url)
        start = time.perf_counter()
        subprocess.run([sys.executable, "-c", (
            "import sys; from pathlib import Path; from fleetdb import db, ingest; "
            "ingest.import_files(db.get_engine(sys.argv[1]), [Path(p) for p in sys.argv[2:]], "
            "by='bench')"), url, str(paths["fleet"]), str(paths["tests"])],
            cwd=REPO, check=True)
        info["import_seconds"] = round(time.perf_counter() - start, 1)
        done.write_text(json.dumps(info, indent=2) + "\n")
    return url, info


def as_of_for(url: str) -> dt.date:
    """A day one week after the fleet's last test, so the board is of a live week."""
    from sqlalchemy import text

    from fleetdb import db

    with db.get_engine(url).connect() as conn:
        last = conn.execute(text("SELECT MAX(tested_at) FROM test")).scalar_one()
    return datetime.fromisoformat(str(last)).date() + dt.timedelta(days=7)


# -- server-side callbacks --------------------------------------------------------------------

def _time(fn: Callable[[], Any], repeat: int) -> list[float]:
    """Wall times of ``repeat`` calls, ms (one untimed warm-up call first)."""
    fn()
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append((time.perf_counter() - start) * 1000)
    return times


def _post(client: Any, deps: list[dict[str, Any]], output_id: str, values: dict[str, Any],
          trigger: str) -> Callable[[], Any]:
    """A zero-argument call that POSTs one callback the way the renderer does."""
    dep = next(d for d in deps if output_id in [p.rsplit(".", 1)[0] for p in
                                                d["output"].strip(".").split("...")])
    outputs = [{"id": p.rsplit(".", 1)[0], "property": p.rsplit(".", 1)[1]}
               for p in dep["output"].strip(".").split("...")]

    def fill(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{**i, "value": values.get(f"{i['id']}.{i['property']}")} for i in items]
    body = {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": fill(dep["inputs"]), "state": fill(dep["state"]),
            "changedPropIds": [trigger]}

    def call() -> Any:
        reply = client.post("/_dash-update-component", json=body)
        if reply.status_code != 200:
            raise RuntimeError(f"{output_id}: HTTP {reply.status_code}: {reply.data[:300]!r}")
        return reply.get_json()
    return call


def measure_server(url: str, day: dt.date, repeat: int) -> list[dict[str, Any]]:
    """Each callback through the test client, beside the library call it makes."""
    from dashboard import create_app, data, ids
    from fleetdb import db, health

    engine = db.get_engine(url)
    app = create_app(url, auth=False)
    client = app.server.test_client()
    deps = client.get("/_dash-dependencies").get_json()
    sites, families = data.sites_and_families(url)
    total = health.board(engine, day, limit=0)["total"]
    last_page = max(0, (total - 1) // data.BOARD_PAGE_SIZE)
    first_unit = health.board(engine, day, limit=1)["rows"][0]["fleet_no"]
    base = {f"{ids.BOARD_AS_OF}.date": day.isoformat(), f"{ids.BOARD_TABLE}.page_current": 0}
    table, as_of = ids.BOARD_TABLE, f"{ids.BOARD_AS_OF}.date"
    cases: list[tuple[str, dict[str, Any], str, dict[str, Any]]] = [
        ("board: first load", {}, as_of, {}),
        ("board: filter by level", {f"{ids.BOARD_LEVEL}.value": "watch"},
         f"{ids.BOARD_LEVEL}.value", {"level": "watch"}),
        ("board: filter by site", {f"{ids.BOARD_SITE}.value": sites[0]},
         f"{ids.BOARD_SITE}.value", {"site": sites[0]}),
        ("board: filter by family", {f"{ids.BOARD_FAMILY}.value": families[0]},
         f"{ids.BOARD_FAMILY}.value", {"family": families[0]}),
        ("board: search fleet number", {f"{ids.BOARD_SEARCH}.value": "12"},
         f"{ids.BOARD_SEARCH}.value", {"search": "12"}),
        ("board: next page", {f"{table}.page_current": 1}, f"{table}.page_current",
         {"offset": data.BOARD_PAGE_SIZE}),
        ("board: last page", {f"{table}.page_current": last_page}, f"{table}.page_current",
         {"offset": last_page * data.BOARD_PAGE_SIZE}),
    ]
    results = []
    for label, values, trigger, library_args in cases:
        post = _post(client, deps, ids.BOARD_TABLE, {**base, **values}, trigger)
        offset = library_args.pop("offset", 0)
        def library(args: dict[str, Any] = library_args, offset: int = offset) -> Any:
            return health.board(engine, day, offset=offset, limit=data.BOARD_PAGE_SIZE, **args)
        results.append(_result(label, _time(post, repeat), _time(library, repeat),
                               GOAL_CALLBACK_MS))
    export = _post(client, deps, ids.BOARD_DOWNLOAD,
                   {f"{ids.BOARD_EXPORT}.n_clicks": 1, as_of: day.isoformat()},
                   f"{ids.BOARD_EXPORT}.n_clicks")
    results.append(_result(f"board: export CSV ({total:,} rows)", _time(export, repeat),
                           _time(lambda: health.board(engine, day), repeat), None))
    unit_values = {f"{ids.UNIT_PICK}.value": first_unit, f"{ids.UNIT_AS_OF}.date":
                   day.isoformat(), f"{ids.UNIT_PRESSURE_UNIT}.value": "psi",
                   f"{ids.UNIT_BASIS}.value": "sea_level"}

    def unit_cold() -> Any:
        data._unit_report.cache_clear()  # a unit opened for the first time
        return _post(client, deps, ids.UNIT_COMPRESSION, unit_values,
                     f"{ids.UNIT_PICK}.value")()
    results.append(_result(f"unit page: compression chart ({first_unit})",
                           _time(unit_cold, repeat),
                           _time(lambda: health.unit_report(engine, first_unit, day), repeat),
                           GOAL_CALLBACK_MS))
    return results


def _result(label: str, ours: list[float], library: list[float],
            goal: float | None) -> dict[str, Any]:
    return {"what": label, "ours_median_ms": round(statistics.median(ours), 1),
            "ours_ms": [round(t, 1) for t in ours],
            "library_median_ms": round(statistics.median(library), 1),
            "goal_ms": goal}


# -- the browser ------------------------------------------------------------------------------

#: Installed before any page script: when the board's rows first appear, and a helper that
#: clicks something and resolves when the "Showing ..." line changes (timed in the page).
_PAGE_TIMING = """
window.__rowsDrawnAt = null;
new MutationObserver((_, observer) => {
  if (document.querySelector("#board-table td[data-dash-column='level']")) {
    window.__rowsDrawnAt = performance.now();
    observer.disconnect();
  }
}).observe(document, {childList: true, subtree: true});
window.__timeUntilRowsChange = (click) => new Promise(resolve => {
  const showing = document.querySelector("#board-showing");
  const before = showing.innerText;
  const start = performance.now();
  const observer = new MutationObserver(() => {
    if (showing.innerText !== before) {
      observer.disconnect();
      resolve(performance.now() - start);
    }
  });
  observer.observe(showing, {childList: true, subtree: true, characterData: true});
  click();
});
"""


def measure_browser(url: str, day: dt.date, repeat: int) -> tuple[list[dict[str, Any]],
                                                                  str | None]:
    """First load, next page and a level filter in Chromium, each to its rows drawn.

    Timed inside the page (``performance.now()``): the first load from the navigation's
    start to the first row in the DOM; a page change or filter from the click to the new
    "Showing ..." line (written by the same callback that sends the rows).
    """
    if not CHROMIUM.exists():
        return [], f"{CHROMIUM} is missing (apt-get install chromium)"
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        return [], "the playwright package is missing"
    from werkzeug.serving import make_server

    from dashboard import create_app

    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    server = make_server("127.0.0.1", 0, create_app(url, auth=False).server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    first, pages, filters = [], [], []
    try:
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                         args=CHROMIUM_FLAGS)
            for _ in range(repeat + 1):  # the first round warms the server, not timed
                context = browser.new_context(
                    base_url=f"http://127.0.0.1:{server.server_port}",
                    viewport={"width": 1280, "height": 900})
                context.add_init_script(_PAGE_TIMING)
                page = context.new_page()
                page.goto(f"/?as_of={day.isoformat()}")
                page.wait_for_function("window.__rowsDrawnAt !== null")
                first.append(page.evaluate("window.__rowsDrawnAt"))
                page.locator("#board-showing").filter(has_text="Showing 1–").wait_for()
                page.wait_for_load_state("networkidle")  # the page's other callbacks done
                for _ in range(3):
                    pages.append(page.evaluate(
                        "window.__timeUntilRowsChange(() => document.querySelector("
                        "'#board-table button.next-page').click())"))
                    page.wait_for_timeout(200)
                page.locator("#board-level").click()
                option = page.get_by_role("option", name="● watch")
                option.wait_for()
                filters.append(page.evaluate(
                    "window.__timeUntilRowsChange(() => [...document.querySelectorAll("
                    "'[role=option]')].find(o => o.innerText.trim() === '● watch').click())"))
                context.close()
            browser.close()
    finally:
        server.shutdown()
        thread.join(timeout=10)
    rows = [("browser: first load to rows drawn", first[1:], GOAL_FIRST_LOAD_MS),
            ("browser: next page to rows drawn", pages[3:], GOAL_CALLBACK_MS),
            ("browser: level filter to rows drawn", filters[1:], GOAL_CALLBACK_MS)]
    return [{"what": label, "ours_median_ms": round(statistics.median(times), 1),
             "ours_ms": [round(t, 1) for t in times], "library_median_ms": None,
             "goal_ms": goal} for label, times, goal in rows], None


# -- report -----------------------------------------------------------------------------------

def _print(result: dict[str, Any]) -> None:
    print(f"\nDashboard, {result['data']['units']:,} units, {result['data']['tests']:,} tests, "
          f"{result['data']['readings']:,} readings; as of {result['as_of']}; "
          f"refresh_fleet {result['refresh_seconds']:.1f} s; medians of "
          f"{result['repeat']} runs")
    print(f"{'what':<48} {'ours ms':>9} {'library ms':>11} {'goal ms':>8}  within goal")
    for row in result["server"] + result["browser"]:
        library = "" if row["library_median_ms"] is None else f"{row['library_median_ms']:.1f}"
        goal = "" if row["goal_ms"] is None else f"{row['goal_ms']:.0f}"
        verdict = "" if row["goal_ms"] is None else (
            "yes" if row["ours_median_ms"] <= row["goal_ms"] else "NO")
        print(f"{row['what']:<48} {row['ours_median_ms']:>9.1f} {library:>11} {goal:>8}  "
              f"{verdict}")
    if result["browser_skipped"]:
        print(f"browser: skipped ({result['browser_skipped']})")
    print("library = the fleetdb call the callback makes, alone (same run); "
          "ours = the whole callback over HTTP in-process, or the browser to rows drawn.")


def run(n_units: int, repeat: int) -> dict[str, Any]:
    """Prepare the store, refresh, measure, print, write JSON; returns the result."""
    from fleetdb import db, health

    url, info = prepare_store(n_units)
    day = as_of_for(url)
    start = time.perf_counter()
    health.refresh_fleet(db.get_engine(url), day)
    refresh_seconds = time.perf_counter() - start
    server = measure_server(url, day, repeat)
    browser, skipped = measure_browser(url, day, max(3, repeat // 2))
    result = {"benchmark": "dashboard", "when": datetime.now(UTC).isoformat(timespec="seconds"),
              "machine": {"cpus": os.cpu_count(), "loadavg": list(os.getloadavg()),
                          "python": sys.version.split()[0]},
              "data": info, "as_of": day.isoformat(), "repeat": repeat,
              "refresh_seconds": round(refresh_seconds, 2), "server": server,
              "browser": browser, "browser_skipped": skipped}
    _print(result)
    OUT.mkdir(parents=True, exist_ok=True)
    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    out = OUT / f"dashboard-{n_units}u-{stamp}.json"
    out.write_text(json.dumps(result, indent=2) + "\n")
    print(f"written: {out.relative_to(REPO)}")
    return result


def main(small: bool = False, units: int | None = None) -> None:
    """Entry point for tests/bench/run_all.py: full scale, or ``small`` (300 units)."""
    n_units = units or (SMALL_UNITS if small else FULL_UNITS)
    run(n_units, repeat=5 if small else 11)


def _cli() -> None:
    parser = argparse.ArgumentParser(description="Benchmark the dashboard's board callbacks.")
    parser.add_argument("--small", action="store_true", help=f"{SMALL_UNITS} units")
    parser.add_argument("--units", type=int, help="fleet size (default 20,000)")
    parser.add_argument("--repeat", type=int, help="timed runs per figure")
    args = parser.parse_args()
    n_units = args.units or (SMALL_UNITS if args.small else FULL_UNITS)
    run(n_units, repeat=args.repeat or (5 if args.small else 11))


if __name__ == "__main__":
    _cli()
