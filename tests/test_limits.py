"""Engine family limits are versioned: a change adds a version (who, when, why), old versions
stay, and health levels and verdicts name the version they were judged by."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from sqlalchemy import text
from sqlalchemy.engine import Engine

from dashboard import components
from fleetdb import health, ingest, limits, registry
from fleetdb.cli import cli
from fleetdb.errors import InvalidInput
from tests.conftest import DATA, write

#: 1 psi in kPa: NIST SP 811 (2008) App. B.8, lbf/in² = 6.894 757 E+03 Pa (exact value
#: 8 896 443 230 521 / 1 290 320 000 Pa, computed from the exact pound and inch).
KPA_PER_PSI = 8_896_443_230_521 / 1_290_320_000 / 1000
AS_OF = dt.date(2024, 3, 4)  # the week after tests/data's T-101 test


@pytest.fixture
def store(engine: Engine) -> Engine:
    """tests/data's fleet and tests on each engine."""
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv", DATA / "events.csv"],
                        by="importer")
    return engine


def _versions(engine: Engine, family: str) -> list[dict]:
    return limits.history(engine, family)["versions"]


def test_families_start_at_version_one_with_who_and_why(store: Engine) -> None:
    hist = limits.history(store, "TEST-L4")
    assert hist["current_version"] == 1
    (v1,) = hist["versions"]
    assert (v1["version"], v1["set_by"], v1["source"]) == (1, "importer", "import")
    assert v1["reason"] == "engine family created by fleet file fleet.csv"
    assert v1["batch_id"] is not None and v1["set_at"]
    assert v1["min_compression_kpa"] == pytest.approx(120 * KPA_PER_PSI, rel=1e-12)
    assert (v1["min_compression_typed"], v1["min_compression_unit"]) == ("120", "psi")
    assert (v1["spread_rule"], v1["min_ratio"], v1["test_interval_days"]) == ("ratio", 0.75, 365)


def test_a_fleet_file_with_new_limits_adds_a_version(store: Engine, tmp_path: Path) -> None:
    path = write(tmp_path / "limits.csv", """
        fleet_no,site,engine_family,min_compression,compression_units,min_crank_rpm,limits_reason
        T-101,Low Yard,TEST-L4,8.5,bar,200,service data revision C
        T-102,Low Yard,TEST-L4,,,,
        T-201,High Yard,TEST-V6,125,psi,,
    """)
    (report,) = ingest.import_files(store, [path], by="planner")
    assert report.written == {"sites": 0, "engine families": 0, "units": 0,
                              "limit versions": 1}
    assert report.present == 3
    v1, v2 = _versions(store, "TEST-L4")
    assert v1["min_compression_typed"] == "120"  # the old version stays as it was
    assert (v2["version"], v2["set_by"], v2["source"], v2["reason"], v2["batch_id"]) == (
        2, "planner", "import", "service data revision C", report.batch_id)
    assert v2["min_compression_kpa"] == pytest.approx(850.0, rel=1e-12)  # 1 bar = 100 kPa
    assert (v2["min_compression_typed"], v2["min_compression_unit"]) == ("8.5", "bar")
    assert v2["min_crank_rpm"] == 200.0
    assert len(_versions(store, "TEST-V6")) == 1  # the same limits: no new version
    with store.connect() as conn:
        fam = conn.execute(text("SELECT min_compression_kpa, min_crank_rpm, limits_version "
                                "FROM engine_family WHERE name = 'TEST-L4'")).one()
    assert tuple(fam) == pytest.approx((850.0, 200.0, 2))


def test_reason_defaults_to_file_and_line(store: Engine, tmp_path: Path) -> None:
    path = write(tmp_path / "interval.csv", """
        fleet_no,site,engine_family,test_interval_days
        T-102,Low Yard,TEST-L4,
        T-101,Low Yard,TEST-L4,180
    """)
    ingest.import_files(store, [path], by="planner")
    assert _versions(store, "TEST-L4")[-1]["reason"] == "fleet file interval.csv, line 3"


def test_conflicting_fuel_on_an_existing_family_is_refused(store: Engine,
                                                         tmp_path: Path) -> None:
    path = write(tmp_path / "fuel.csv", """
        fleet_no,site,engine_family,fuel,min_compression,compression_units
        T-101,Low Yard,TEST-L4,lpg,125,psi
        T-102,Low Yard,TEST-L4,gasoline,125,psi
    """)
    with pytest.raises(InvalidInput) as caught:
        ingest.import_files(store, [path])
    assert [str(p) for p in caught.value.problems] == [
        f"{path}, line 3, column fuel: 'gasoline' conflicts with 'lpg' given for engine "
        "family 'TEST-L4' on line 2"]
    path.write_text("fleet_no,site,engine_family,fuel,min_compression,compression_units\n"
                    "T-101,Low Yard,TEST-L4,gasoline,125,psi\n")
    with pytest.raises(InvalidInput, match=r"fuel.csv, line 2, column fuel: 'gasoline' differs "
                                           r"from the stored fuel of engine family 'TEST-L4' "
                                           r"\(lpg\)"):
        ingest.import_files(store, [path])
    assert len(_versions(store, "TEST-L4")) == 1  # nothing written, not even the limits


def test_verdict_board_and_unit_report_name_the_limits_version(store: Engine) -> None:
    # T-101's lowest cylinder reads 120 psi (at 5 m; 101.2 kPa barometer): at the 120 psi
    # minimum of version 1 it passes, under version 2's 125 psi it is below the minimum.
    test_id = store.connect().execute(text(
        "SELECT t.id FROM test t JOIN unit u ON u.id = t.unit_id "
        "WHERE u.fleet_no = 'T-101'")).scalar_one()
    before = health.test_verdict(store, test_id)
    assert before["limits"]["version"] == 1
    assert "below_minimum" not in {f["code"] for f in before["findings"]}
    health.refresh_fleet(store, AS_OF)
    result = registry.set_limits(store, "TEST-L4", {"min_compression": "125 psi"},
                                 reason="service data revision C", by="admin")
    assert result["changed"] and result["version"] == 2
    after = health.test_verdict(store, test_id)
    assert after["limits"]["version"] == 2 and after["limits"]["set_by"] == "admin"
    assert after["limits"]["min_compression_kpa"] == pytest.approx(125 * KPA_PER_PSI)
    assert "below_minimum" in {f["code"] for f in after["findings"]}
    panel = str(components.verdict_panel(after, "psi", "x"))
    assert "Judged by the engine family's limits version 2" in panel
    assert "by admin: service data revision C" in panel
    report = health.unit_report(store, "T-101", AS_OF)
    assert report["limits"]["version"] == 2
    assert report["limits"]["reason"] == "service data revision C"
    # The week stored before the change keeps the version it was judged by.
    row = {r["fleet_no"]: r for r in health.board(store, AS_OF)["rows"]}["T-101"]
    assert row["limits_version"] == 1
    health.refresh_fleet(store, AS_OF)
    row = {r["fleet_no"]: r for r in health.board(store, AS_OF)["rows"]}["T-101"]
    assert row["limits_version"] == 2
    assert "below_minimum" in row["reasons"]
    t201 = {r["fleet_no"]: r for r in health.board(store, AS_OF)["rows"]}["T-201"]
    assert t201["limits_version"] == 1  # another family, untouched


def test_same_limits_again_add_no_version(store: Engine) -> None:
    again = registry.set_limits(store, "TEST-L4", {"min_compression": "120", "min_ratio": "0.75"},
                                reason="checked against the service data", by="admin")
    assert not again["changed"] and again["version"] == 1


@pytest.mark.parametrize(("typed", "message"), [
    ({"min_ratio": "1.5"}, "column --min-ratio: 1.5 is outside the plausible range 0.01 to 1"),
    ({"min_compression": "3 inHg"}, "column --min-compression: 'inHg': use psi, kPa, bar"),
    ({"spread_rule": "diff"}, "column --max-difference: the diff spread rule needs"),
    ({"min_crank_rpm": "fast"}, "column --min-crank-rpm: 'fast' is not a number"),
    ({"test_interval_days": "inf"}, "column --test-interval-days: inf is outside"),
    ({"min_compression": "-5 psi"}, "column --min-compression: -5 is outside"),
    ({"min_compression": "lots"}, "column --min-compression: 'lots' is not a number with"),
])
def test_bad_limits_are_refused_with_the_option_named(store: Engine, typed: dict,
                                                      message: str) -> None:
    with pytest.raises(InvalidInput, match=message):
        registry.set_limits(store, "TEST-L4", typed, reason="typo check", by="admin")
    assert len(_versions(store, "TEST-L4")) == 1


def test_cli_family_limits(store: Engine) -> None:
    url = store.url.render_as_string(hide_password=False)

    def run(*args: str, code: int = 0) -> str:
        result = CliRunner().invoke(cli, ["family", "limits", *args, "--db", url])
        assert result.exit_code == code, result.output
        assert "Traceback" not in result.output
        return result.output

    assert run("TEST-V6", "--min-compression", "130psi", code=2).endswith(
        "Error: say why with --reason when changing limits\n")
    out = run("TEST-V6", "--min-compression", "130psi", "--max-difference", "20 psi",
              "--spread-rule", "diff", "--reason", "shop decision", "--by", "admin")
    assert out == ("Limits of TEST-V6 are now version 2: minimum 130 psi; spread: highest - "
                   "lowest <= 20 psi; cranking rpm: fuel default; tested warm; every 365 "
                   "days\n")
    out = run("TEST-V6", "--max-difference", "none", "--reason", "x", code=1)
    assert "column --max-difference: the diff spread rule needs max_difference" in out
    hist = json.loads(run("TEST-V6", "--json"))
    assert hist["current_version"] == 2
    assert [(v["version"], v["reason"]) for v in hist["versions"]] == [
        (1, "engine family created by fleet file fleet.csv"), (2, "shop decision")]
    assert hist["versions"][1]["max_diff_kpa"] == pytest.approx(20 * KPA_PER_PSI)
    assert "version 2" in run("TEST-V6")
    assert "no engine family named 'NOPE'" in run("NOPE", code=1)
    unit = CliRunner().invoke(cli, ["unit", "T-201", "--db", url]).output
    assert "Judged by limits version 2 of TEST-V6" in unit


#: Text that has broken parsers elsewhere (see tests/test_fuzz.py).
HOSTILE = ["", " ", "NaN", "inf", "-inf", "1e309", "9" * 400, "0x1F", "1_000", "١٢٠", "１２０",
           "²", "-0", "0", "1e-320", "=1+1", "'; DROP TABLE family_limits; --", "none",
           "default", "120 psi", "8.3bar", "3 inHg", "0.8", "200", "yes", "no", "diff",
           "ratio_mean", "\x00", "x" * 600]


def test_hostile_limits_end_in_a_message_or_a_version(engine: Engine) -> None:
    # Every case is refused with the option named, or kept as exactly one new version
    # whose values the family row then holds; never a traceback, never half a write.
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from tests.conftest import IN_CI

    ingest.import_files(engine, [DATA / "fleet.csv"], by="importer")
    fields = st.sampled_from(sorted(set(limits.LIMIT_FIELDS) - {"compression_units"}))
    text_ = st.sampled_from(HOSTILE) | st.text(max_size=10)

    @settings(max_examples=40, deadline=None, database=None, derandomize=IN_CI,
              suppress_health_check=[HealthCheck.function_scoped_fixture])
    @given(st.dictionaries(fields, text_, min_size=1, max_size=3), text_)
    def case(typed: dict[str, str], reason: str) -> None:
        before = limits.history(engine, "TEST-V6")
        try:
            result = registry.set_limits(engine, "TEST-V6", typed, reason=reason, by="fuzz")
        except InvalidInput as exc:
            assert all(p.source == "command line" and p.field and p.field.startswith("--")
                       for p in exc.problems), exc
            assert limits.history(engine, "TEST-V6") == before
            return
        after = limits.history(engine, "TEST-V6")
        added = len(after["versions"]) - len(before["versions"])
        assert added == (1 if result["changed"] else 0)
        assert after["current_version"] == after["versions"][-1]["version"] == result["version"]
        with engine.connect() as conn:
            fam = conn.execute(text("SELECT * FROM engine_family WHERE name = 'TEST-V6'")
                               ).mappings().one()
        for col in limits.LIMIT_COLUMNS:
            want, got = after["versions"][-1][col], fam[col]
            assert (want == got) if not isinstance(want, float) else got == pytest.approx(want)

    case()
