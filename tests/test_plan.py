"""The overhaul planner: the scheduling rule against exhaustive search and an integer program,
capacity and closed weeks always respected, the demo fleet's worn units, the store and CLI.

Sources: domain.md §7 (Jackson's rule, EDD; unit jobs under weekly capacity; its lower bound)
and §9 item 24; scipy.optimize.milp (HiGHS) as an independent reference solver.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy.optimize import Bounds, LinearConstraint, milp
from sqlalchemy import text
from sqlalchemy.engine import Engine

import demo_fleet
from fleetdb import db, health, ingest
from fleetdb import plan as P
from fleetdb.cli_plan import plan as plan_cmd
from fleetdb.errors import InvalidValue
from tests.conftest import copy_store, write

AS_OF = dt.date(2026, 12, 1)  # a Tuesday of ISO week 2026-W49
WEEK0 = dt.date(2026, 11, 30)
WORN = {"LT-902", "LV-903", "LV-933", "GS-901"}


# -- oracles (independent of fleetdb.plan) ----------------------------------------------------

def brute_force_lmax(due: list[int], release: list[int], capacity: list[int]) -> int:
    """The least L_max over every assignment of jobs to the weeks 0..len(capacity)-1."""
    n, horizon = len(due), len(capacity)
    grid = np.indices((horizon,) * n, dtype=np.int8).reshape(n, -1).T
    ok = (grid >= np.asarray(release)).all(axis=1)
    for week, cap in enumerate(capacity):
        ok &= (grid == week).sum(axis=1) <= cap
    return int((grid[ok].astype(int) - np.asarray(due)).max(axis=1).min())


def milp_lmax(due: list[int], release: list[int], capacity: list[int]) -> int:
    """The least L_max by an integer program solved with scipy's HiGHS (reference library).

    x[j, w] = 1 when job j is in week w (w >= r_j); minimise L subject to one week per job,
    at most capacity[w] jobs in week w, and sum_w w x[j, w] - L <= d_j.
    """
    n, horizon = len(due), len(capacity)
    nx = n * horizon
    cost = np.zeros(nx + 1)
    cost[-1] = 1.0
    one_week = np.zeros((n, nx + 1))
    per_week = np.zeros((horizon, nx + 1))
    late = np.zeros((n, nx + 1))
    upper = np.ones(nx + 1)
    for j in range(n):
        for w in range(horizon):
            one_week[j, j * horizon + w] = 1
            per_week[w, j * horizon + w] = 1
            late[j, j * horizon + w] = w
            if w < release[j]:
                upper[j * horizon + w] = 0
        late[j, -1] = -1
    lower = np.zeros(nx + 1)
    lower[-1], upper[-1] = -horizon - max(due), horizon
    result = milp(cost, integrality=np.r_[np.ones(nx), 0],
                  bounds=Bounds(lower, upper),
                  constraints=[LinearConstraint(one_week, 1, 1),
                               LinearConstraint(per_week, 0, np.asarray(capacity, float)),
                               LinearConstraint(late, -np.inf, np.asarray(due, float))])
    assert result.success, result.message
    return int(round(result.x[-1]))


def horizon_for(due: list[int], weeks: np.ndarray) -> int:
    """Weeks to search: past EDD's last week, and far enough that a later week could only
    be worse than EDD's L_max (a job in week >= max(d) + L_edd + 1 is later than L_edd)."""
    l_edd = int((weeks - np.asarray(due)).max())
    return max(int(weeks.max()) + 1, max(due) + l_edd + 1)


# -- the rule on small cases ------------------------------------------------------------------

def test_domain_check_value_24_edd_with_capacity_two() -> None:
    # domain.md §9 item 24: A, B, C due wk1, D wk2, E wk3, capacity 2 -> wk1 {A, B},
    # wk2 {C, D}, wk3 {E}; L_max = 1 (C). (a) Jackson 1955 / exchange argument; the
    # domain check value, computed.
    weeks = P.edd_weeks([1, 1, 1, 2, 3], [1] * 5, lambda w: 2, start=1)
    assert weeks.tolist() == [1, 1, 2, 2, 3]
    jobs = pd.DataFrame({"unit_id": range(1, 6), "fleet_no": list("ABCDE"), "site": "Shop",
                         "due_week_start": [WEEK0] * 3 + [WEEK0 + dt.timedelta(weeks=k)
                                                          for k in (1, 2)]})
    plan = P.schedule(jobs, P.ShopSettings(default_capacity=2, default_lead_weeks=0), AS_OF)
    by = plan.jobs.set_index("fleet_no")
    assert {f: int(by.at[f, "week_index"]) + 1 for f in "ABCDE"} == {
        "A": 1, "B": 1, "C": 2, "D": 2, "E": 3}
    assert plan.l_max == 1 and plan.late_count == 1 and bool(by.at["C", "late"])
    # The domain's lower bound: 3 jobs due by wk1 > capacity 2 -> L_max >= ceil(1/2) = 1.
    assert plan.l_max == -(-(3 - 2 * 1) // 2)


@st.composite
def small_instances(draw: st.DrawFn) -> tuple[list[int], list[int], list[int], int]:
    n = draw(st.integers(1, 6))
    due = draw(st.lists(st.integers(0, 4), min_size=n, max_size=n))
    release = draw(st.lists(st.integers(0, 2), min_size=n, max_size=n))
    early = draw(st.lists(st.integers(0, 2), max_size=6))  # 0 = a closed week
    return due, release, early, draw(st.integers(1, 2))


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_instances())
def test_edd_equals_exhaustive_search(case: tuple[list[int], list[int], list[int], int]) -> None:
    # Exhaustive search over every assignment (<= 6 jobs, capacity 0-2 a week, release
    # weeks): EDD among released jobs reaches the optimum L_max. domain.md §7: (a) Jackson
    # 1955 for one machine, (c) for weekly capacity with release dates (§10 open item).
    due, release, early, base = case
    weeks = P.edd_weeks(due, release, lambda w: early[w] if w < len(early) else base)
    horizon = horizon_for(due, weeks)
    assume(horizon ** len(due) <= 1_500_000)
    capacity = [early[w] if w < len(early) else base for w in range(horizon)]
    assert (weeks >= np.asarray(release)).all()
    assert all((weeks == w).sum() <= capacity[w] for w in range(horizon))
    assert int((weeks - np.asarray(due)).max()) == brute_force_lmax(due, release, capacity)


@pytest.mark.parametrize("seed", range(6))
def test_schedule_equals_integer_program(seed: int) -> None:
    # Larger instances through the public schedule(): 12-24 units at one site, lead time,
    # closed weeks, capacity 1-3. Reference: scipy.optimize.milp (HiGHS) on the same jobs.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(12, 25))
    due = rng.integers(0, 10, n).tolist()
    cap, lead = int(rng.integers(1, 4)), int(rng.integers(0, 3))
    closed = {WEEK0 + dt.timedelta(weeks=int(w)) for w in rng.choice(12, 3, replace=False)}
    jobs = pd.DataFrame({"unit_id": range(n), "fleet_no": [f"U-{i:02d}" for i in range(n)],
                         "site": "Shop",
                         "due_week_start": [WEEK0 + dt.timedelta(weeks=d) for d in due]})
    plan = P.schedule(jobs, P.ShopSettings(default_capacity=cap, default_lead_weeks=lead,
                                           closed={"Shop": closed}), AS_OF)
    got = plan.jobs.sort_values("unit_id")
    horizon = horizon_for(due, got["week_index"].to_numpy())
    capacity = [0 if WEEK0 + dt.timedelta(weeks=w) in closed else cap for w in range(horizon)]
    assert plan.l_max == milp_lmax(due, [lead] * n, capacity)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 30), min_size=1, max_size=200), st.integers(1, 5))
def test_edd_meets_the_domain_lower_bound(due: list[int], cap: int) -> None:
    # domain.md §7: L_max >= max_w ceil((N_w - c w)/c), N_w jobs due by week w (weeks from
    # 1; here from 0, so c (w + 1) slots). Derived: some job due by w sits in week
    # >= ceil(N_w / c) - 1, and without release dates EDD attains the bound taken over the
    # due weeks exactly, late or not.
    weeks = P.edd_weeks(due, [0] * len(due), lambda w: cap)
    l_max = int((weeks - np.asarray(due)).max())
    counts = np.bincount(due)
    bound = max(-(-(int(counts[: w + 1].sum()) - cap * (w + 1)) // cap) for w in set(due))
    assert l_max == bound


# -- invariants of schedule() -----------------------------------------------------------------

@st.composite
def shop_cases(draw: st.DrawFn) -> tuple[pd.DataFrame, P.ShopSettings]:
    n = draw(st.integers(0, 14))
    sites = ["North", "South"]
    rows = []
    for i in range(n):
        booked = draw(st.one_of(st.none(), st.integers(-2, 6)))
        rows.append({"unit_id": i, "fleet_no": f"U-{i:02d}",
                     "site": draw(st.sampled_from(sites)),
                     "due_week_start": WEEK0 + dt.timedelta(weeks=draw(st.integers(-3, 8))),
                     "booked_week_start": None if booked is None
                     else WEEK0 + dt.timedelta(weeks=booked)})
    closed = {s: frozenset(WEEK0 + dt.timedelta(weeks=w) for w in draw(
        st.sets(st.integers(0, 10), max_size=4))) for s in [*sites, "*"]}
    shop = P.ShopSettings(
        default_capacity=draw(st.integers(1, 3)),
        capacity={"South": draw(st.integers(1, 3))},
        default_lead_weeks=draw(st.integers(0, 3)), lead_weeks={"North": draw(st.integers(0, 3))},
        closed=closed,
        priority={f"U-{i:02d}": draw(st.integers(1, 3)) for i in range(n)
                  if draw(st.booleans())})
    return pd.DataFrame(rows, columns=["unit_id", "fleet_no", "site", "due_week_start",
                                       "booked_week_start"]), shop


@settings(max_examples=60, deadline=None)
@given(shop_cases())
def test_capacity_and_closed_weeks_are_respected(case: tuple[pd.DataFrame, P.ShopSettings]
                                                 ) -> None:
    # Invariants of any plan (issue: capacity never exceeded, closed weeks respected).
    jobs, shop = case
    plan = P.schedule(jobs, shop, AS_OF)
    got = plan.jobs
    assert len(got) == len(jobs) and set(got["unit_id"]) == set(jobs["unit_id"])
    for (site, start), group in got.groupby(["site", "week_start"]):
        assert start not in shop.closed_of(site)
        assert len(group) <= shop.capacity_of(site)
    assert (got["week_index"] >= 0).all()
    new = got[got["status"] != "booked"]
    release = [shop.lead_of(s) for s in new["site"]]
    assert (new["week_index"].to_numpy() >= np.asarray(release, dtype=int)).all()
    booked = got[got["status"] == "booked"]
    assert (booked["week_start"] == booked["booked_week_start"]).all()
    due = jobs.set_index("unit_id")["due_week_start"].reindex(got["unit_id"])
    expected = [max((d - WEEK0).days // 7, 0) for d in due]
    assert (got["lateness_weeks"].to_numpy() == got["week_index"].to_numpy()
            - np.asarray(expected, dtype=int)).all()
    used = got.groupby(["site", "week_start"]).size()
    load = plan.load.set_index(["site", "week_start"])["used"]
    assert (load.reindex(used.index) == used).all() and load.sum() == len(got)


def test_priority_moves_a_unit_ahead_and_lateness_stays_true() -> None:
    # Rule chosen here (b, common practice, no published source): priority p moves the
    # effective due week p weeks earlier; lateness is measured against the true due week.
    jobs = pd.DataFrame({"unit_id": [1, 2, 3], "fleet_no": ["A", "B", "C"], "site": "Shop",
                         "due_week_start": [WEEK0, WEEK0, WEEK0 + dt.timedelta(weeks=1)]})
    shop = P.ShopSettings(default_lead_weeks=0)
    plain = P.schedule(jobs, shop, AS_OF).jobs.set_index("fleet_no")["week_index"]
    assert plain.to_dict() == {"A": 0, "B": 1, "C": 2}
    raised = P.schedule(jobs, shop.updated(priority={"C": 2}), AS_OF).jobs.set_index("fleet_no")
    assert raised["week_index"].to_dict() == {"C": 0, "A": 1, "B": 2}
    assert raised.at["C", "lateness_weeks"] == -1 and raised.at["B", "lateness_weeks"] == 2


def test_bookings_are_kept_or_rebooked() -> None:
    jobs = pd.DataFrame({"unit_id": [1, 2, 3], "fleet_no": ["A", "B", "C"], "site": "Shop",
                         "due_week_start": [WEEK0] * 3,
                         "booked_week_start": [WEEK0 + dt.timedelta(weeks=3),
                                               WEEK0 - dt.timedelta(weeks=1),
                                               WEEK0 + dt.timedelta(weeks=3)]})
    shop = P.ShopSettings(default_lead_weeks=1)
    by = P.schedule(jobs, shop, AS_OF).jobs.set_index("fleet_no")
    assert by.at["A", "status"] == "booked" and by.at["A", "week_index"] == 3
    assert by.at["B", "status"] == "rebooked" and by.at["B", "week_index"] == 1
    assert by.at["C", "status"] == "rebooked"  # week 3 has one slot and A holds it
    closed = shop.updated(closed={"Shop": frozenset({WEEK0 + dt.timedelta(weeks=3)})})
    assert set(P.schedule(jobs, closed, AS_OF).jobs["status"]) == {"rebooked"}


def test_settings_validate_and_round_trip() -> None:
    shop = P.ShopSettings(capacity={"North": 2}, lead_weeks={"North": 0},
                          closed={"*": frozenset({dt.date(2026, 12, 23)})}, priority={"A": 1})
    assert shop.closed_of("South") == {dt.date(2026, 12, 21)}  # a Wednesday -> its Monday
    assert P.ShopSettings.from_json(json.loads(json.dumps(shop.to_json()))) == shop
    assert shop.to_json()["closed"] == {"*": ["2026-W52"]}
    with pytest.raises(InvalidValue):
        P.ShopSettings(default_capacity=-1)
    with pytest.raises(InvalidValue):
        P.parse_week("2026-W54")
    # ISO 8601 week dates: 2026 has 53 weeks; 2027-W01 starts on Monday 2027-01-04.
    assert P.parse_week("2026-W53") == dt.date(2026, 12, 28)
    assert P.iso_week(dt.date(2027, 1, 3)) == "2026-W53"
    with pytest.raises(InvalidValue):
        P.edd_weeks([0], [0], lambda w: 0)


# -- the demo fleet ---------------------------------------------------------------------------

@pytest.fixture
def demo_url(demo_file: Path, tmp_path: Path) -> str:
    return copy_store(demo_file, tmp_path)


@pytest.fixture
def demo(demo_url: str) -> Iterator[Engine]:
    engine = db.make_engine(demo_url)
    yield engine
    engine.dispose()


def test_demo_worn_units_get_slots_before_their_limits(demo: Engine) -> None:
    # The demo's planted stories (demo_fleet/README.md) put these units at act or plan.
    stories = {s.fleet_no for s in demo_fleet.build(as_of=AS_OF).stories
               if s.level in P.JOB_LEVELS}
    assert stories == WORN
    # Room for every worn unit in week 0 at any site, parts on the shelf: capacity allows.
    roomy = P.ShopSettings(default_capacity=len(WORN), default_lead_weeks=0)
    plan = P.make_plan(demo, AS_OF, roomy)
    got = plan.jobs.set_index("fleet_no")
    assert set(got.index) == WORN
    assert (got["week_start"] <= got["due_week_start"]).all() and plan.l_max <= 0
    assert got.loc[["LT-902", "LV-903", "LV-933"], "due_week"].eq("2026-W49").all()
    board = {r["fleet_no"]: r for r in health.board(demo, AS_OF)["rows"]}
    # A plan unit is due in the week of its conservative crossing, a past one now.
    early = dt.date.fromisoformat(board["GS-901"]["projected_date_early"])
    assert got.at["GS-901", "due_week"] == P.iso_week(max(early, WEEK0))


def test_demo_defaults_say_who_runs_late_and_are_optimal(demo: Engine) -> None:
    # Defaults: 1 a week, 2 weeks' lead time: the three act units cannot be on time. The
    # plan's L_max equals the exhaustive optimum of the same jobs and names every late unit.
    plan = P.make_plan(demo, AS_OF)
    got = plan.jobs.sort_values("unit_id")
    due = got["due_index"].tolist()
    capacity = [1] * horizon_for(due, got["week_index"].to_numpy())
    assert plan.l_max == brute_force_lmax(due, [P.DEFAULT_LEAD_WEEKS] * len(due), capacity)
    late = got[got["late"]]
    assert plan.late_count == len(late) > 0
    for row in late.itertuples():
        assert f"{row.fleet_no} by {row.lateness_weeks} week(s)" in " ".join(plan.notes)


def run(args: list[str], url: str, code: int = 0) -> str:
    result = CliRunner().invoke(plan_cmd, [*args, "--db", url], catch_exceptions=False)
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output
    return result.output


def test_cli_plan_json_what_if_commit_and_bookings(demo_url: str, demo: Engine,
                                                   tmp_path: Path) -> None:
    data = json.loads(run(["--json", "--as-of", "2026-12-01", "--weeks", "6"], demo_url))
    assert set(data) == {"as_of", "week_start", "week", "weeks", "settings", "l_max", "late",
                         "jobs", "load", "notes", "based_on", "committed"}
    assert data["week"] == "2026-W49" and data["committed"] is None
    assert set(data["jobs"][0]) == set(P.JOB_COLUMNS)
    assert {s["site"] for s in data["load"]} == {"Ferncliff Depot", "Kettlerock Yard",
                                                 "Saltgrass Quay"}
    whatif = json.loads(run(["--json", "--as-of", "2026-12-01", "--capacity", "4",
                             "--lead-time", "0"], demo_url))
    assert whatif["l_max"] == 0 and whatif["compared_to_current"]["l_max"] == {
        "before": data["l_max"], "after": 0}
    assert P.latest_plan(demo) is None  # a what-if stores nothing
    out = run(["--as-of", "2026-12-01", "--capacity", "Saltgrass Quay=2", "--commit",
               "--by", "planner", "--csv", str(tmp_path / "p.csv"), "--ics",
               str(tmp_path / "p.ics")], demo_url)
    assert "Committed plan 1 by planner" in out and "L_max" in out
    assert (tmp_path / "p.csv").read_text().startswith("week,week_start,site,fleet_no")
    booked = P.bookings(demo, AS_OF)
    ids = {r["fleet_no"]: r["unit_id"] for r in health.board(demo, AS_OF)["rows"]}
    assert set(booked) == {ids[f] for f in WORN}
    again = json.loads(run(["--json", "--as-of", "2026-12-01"], demo_url))
    assert again["based_on"] == 1 and {j["status"] for j in again["jobs"]} == {"booked"}
    assert again["settings"]["capacity"] == {"Saltgrass Quay": 2}  # the settings in force
    text_out = run(["--as-of", "2026-12-01"], demo_url)
    assert "▲ plan" in text_out and "fleetdb advises; it does not certify" in text_out


@pytest.mark.parametrize(("args", "code", "message"), [
    (["--capacity", "Nowhere=2"], 1, "no site named 'Nowhere'"),
    (["--priority", "XX-1=2"], 1, "no unit with fleet number 'XX-1'"),
    (["--priority", "LT-902"], 2, "write FLEET_NO=WEEKS"),
    (["--closed", "2026-W60"], 2, "is not an ISO week"),
    (["--capacity", "two"], 2, "must be a whole number"),
])
def test_cli_plan_errors(demo_url: str, args: list[str], code: int, message: str) -> None:
    out = run([*args, "--as-of", "2026-12-01"], demo_url, code)
    assert message in out


# -- the store, on SQLite and PostgreSQL ------------------------------------------------------

SMALL_FLEET = """
    fleet_no,site,engine_family,in_service,hours_per_week,site_elevation_m,fuel,cylinders,banks,compression_ratio,min_compression,compression_units,min_ratio
    N-1,North Bay,TEST-L4,2022-01-10,30,10,lpg,4,1-2-3-4,9.5,120,psi,0.75
    N-2,North Bay,TEST-L4,2022-01-10,30,,,,,,,,
    N-3,North Bay,TEST-L4,2022-01-10,30,,,,,,,,
    N-4,North Bay,TEST-L4,2022-01-10,30,,,,,,,,
    S-1,South Bay,TEST-L4,2022-01-10,30,12,,,,,,,
"""


def small_tests() -> str:
    lines = ["fleet_no,tested_at,hours,kind,cylinder,value,units,battery_v,crank_rpm,"
             "engine_temp_c,baro_kpa,throttle_open,technician,note"]
    for fleet_no, low in (("N-1", 98), ("N-2", 101), ("N-3", 104), ("N-4", 150),
                          ("S-1", 99)):
        for cylinder, value in enumerate((152, 150, 151, low), start=1):
            extra = "10.3,220,82,101.3,yes,AK," if cylinder == 1 else ",,,,,,"
            lines.append(f"{fleet_no},2026-11-20 09:00,4000,compression,{cylinder},{value},"
                         f"psi,{extra}")
    return "\n".join(lines)


@pytest.fixture
def small_store(engine: Engine, tmp_path: Path) -> Engine:
    fleet = write(tmp_path / "fleet.csv", SMALL_FLEET)
    tests = write(tmp_path / "tests.csv", small_tests())
    ingest.import_files(engine, [fleet, tests], by="test")
    health.refresh_fleet(engine, AS_OF)
    return engine


def test_commit_supersedes_and_keeps_every_plan(small_store: Engine, tmp_path: Path) -> None:
    engine = small_store
    first = P.make_plan(engine, AS_OF, P.ShopSettings(default_lead_weeks=0))
    # Below-minimum cylinders (98-104 psi against 120 psi) make four units act; N-4 is sound.
    assert sorted(first.jobs["fleet_no"]) == ["N-1", "N-2", "N-3", "S-1"]
    assert first.jobs.set_index("fleet_no")["week_index"].to_dict() == {
        "N-1": 0, "N-2": 1, "N-3": 2, "S-1": 0}
    plan_id = P.commit(engine, first, by="planner")
    latest = P.latest_plan(engine, AS_OF)
    assert latest["plan_id"] == plan_id and latest["created_by"] == "planner"
    assert latest["settings"] == first.settings and latest["l_max"] == 2
    assert P.current_settings(engine, AS_OF).default_lead_weeks == 0
    assert P.latest_plan(engine, dt.date(2026, 11, 1)) is None
    ids = dict(first.jobs[["fleet_no", "unit_id"]].itertuples(index=False))
    assert P.bookings(engine, AS_OF) == {ids["N-1"]: WEEK0, ids["N-2"]: WEEK0 + dt.timedelta(7),
                                         ids["N-3"]: WEEK0 + dt.timedelta(14),
                                         ids["S-1"]: WEEK0}
    # A what-if with two slots keeps the booked weeks; committing it supersedes plan 1.
    second = P.make_plan(engine, AS_OF, P.current_settings(engine).updated(capacity={
        "North Bay": 2}))
    assert set(second.jobs["status"]) == {"booked"} and second.based_on == plan_id
    second_id = P.commit(engine, second)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT COUNT(*) FROM overhaul_plan")).scalar_one() == 2
        assert conn.execute(text("SELECT COUNT(*) FROM overhaul_booking")).scalar_one() == 8
    assert P.latest_plan(engine)["plan_id"] == second_id
    # An overhaul done after the plan takes the unit off the bookings.
    events = write(tmp_path / "events.csv",
                   "fleet_no,date,hours,kind,cylinders,note\nN-1,2026-12-01,4010,overhaul,,")
    ingest.import_files(engine, [events], by="test")
    assert ids["N-1"] not in P.bookings(engine, AS_OF) and len(P.bookings(engine, AS_OF)) == 3
