"""Login, sessions and the server-side role checks, over real HTTP on 127.0.0.1.

The app is served by werkzeug on a free port in a thread; each user is a ``requests``
session holding its own cookie, as a browser would.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import requests
from click.testing import CliRunner
from sqlalchemy import text

from dashboard import create_app, data, ids
from fleetdb import access, audit, db, ingest, migrate, users
from fleetdb.cli import cli
from tests.conftest import DATA, served

PASSWORDS = {"tom": "technician pw", "tia": "technician two", "pat": "planner pw",
             "meg": "manager pw", "ada": "admin pw 1"}
ROLES = {"tom": "technician", "tia": "technician", "pat": "planner", "meg": "manager",
         "ada": "admin"}


@pytest.fixture
def store_url(tmp_path: Path) -> Iterator[str]:
    url = f"sqlite:///{tmp_path / 'fleet.sqlite'}"
    migrate.upgrade(url)
    engine = db.get_engine(url)
    ingest.import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"], by="importer")
    for name, role in ROLES.items():
        users.add_user(engine, name, role, PASSWORDS[name])
    yield url
    engine.dispose()
    data.unit_engine.cache_clear()


@pytest.fixture
def base(store_url: str) -> Iterator[str]:
    with served(create_app(store_url, auth=True), "dash-auth") as url:
        yield url


def login(base: str, name: str) -> requests.Session:
    client = requests.Session()
    reply = client.post(f"{base}/login", data={"name": name, "password": PASSWORDS[name],
                                               "next": "/"}, allow_redirects=False)
    assert reply.status_code == 302 and reply.headers["Location"] == "/"
    return client


def callback_body(deps: list[dict[str, Any]], output_id: str, values: dict[str, Any],
                  trigger: str) -> dict[str, Any]:
    """What the browser posts for the callback that outputs ``output_id``; ``values`` by
    ``"id.property"``, a pattern input's by ``"type.property"`` (else an empty list)."""
    dep = next(d for d in deps if f"{output_id}." in d["output"])
    outputs = [{"id": p.rsplit(".", 1)[0], "property": p.rsplit(".", 1)[1]}
               for p in dep["output"].strip(".").split("...")]

    def fill(spec: dict[str, Any]) -> Any:
        if spec["id"].startswith("{"):
            return values.get(json.loads(spec["id"])["type"] + "." + spec["property"], [])
        return {**spec, "value": values.get(f"{spec['id']}.{spec['property']}")}
    return {"output": dep["output"], "outputs": outputs if len(outputs) > 1 else outputs[0],
            "inputs": [fill(s) for s in dep["inputs"]],
            "state": [fill(s) for s in dep.get("state", [])], "changedPropIds": [trigger]}


def post_callback(client: requests.Session, base: str, output_id: str, values: dict[str, Any],
                  trigger: str) -> requests.Response:
    deps = client.get(f"{base}/_dash-dependencies").json()
    return client.post(f"{base}/_dash-update-component",
                       json=callback_body(deps, output_id, values, trigger))


def count(url: str, table: str) -> int:
    with db.get_engine(url).connect() as conn:
        return conn.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one()


PLAN_COMMIT = {f"{ids.PLAN_AS_OF}.date": "2025-06-01", f"{ids.PLAN_COMMIT}.n_clicks": 1,
               f"{ids.PLAN_TRY}.n_clicks": 0, f"{ids.PLAN_CLOSED_ALL}.value": "",
               f"{ids.PLAN_PRIORITY}.value": "", f"{ids.PLAN_WHO}.value": "someone"}


def log_values(hours: str, cylinders: list[str]) -> dict[str, Any]:
    values = {f"{ids.LOG_UNIT}.value": "T-101", f"{ids.LOG_TESTED_AT}.value": "2025-06-01 09:00",
              f"{ids.LOG_HOURS}.value": hours, f"{ids.LOG_KIND}.value": "compression",
              f"{ids.LOG_PRESSURE_UNIT}.value": "psi", f"{ids.LOG_VACUUM_UNIT}.value": "inHg",
              f"{ids.LOG_THROTTLE}.value": "", f"{ids.LOG_SAVE}.n_clicks": 1}
    pattern = ids.log_cylinder(None)["type"]
    for prop in ("value", "id"):
        values[f"{pattern}.{prop}"] = [
            {"id": ids.log_cylinder(n), "property": prop,
             "value": ids.log_cylinder(n) if prop == "id" else v}
            for n, v in enumerate(cylinders, start=1)]
    return values


def test_without_a_session_only_the_login_page_and_static_files_answer(base: str) -> None:
    anon = requests.Session()
    page = anon.get(f"{base}/unit?fleet_no=T-101", allow_redirects=False)
    assert page.status_code == 302
    assert page.headers["Location"] == "/login?next=/unit?fleet_no=T-101"
    for path in ("/_dash-layout", "/_dash-dependencies"):
        assert anon.get(f"{base}{path}").status_code == 401
    assert anon.post(f"{base}/_dash-update-component", json={}).status_code == 401
    assert anon.get(f"{base}/_favicon.ico").status_code == 200
    form = anon.get(f"{base}/login")
    assert form.status_code == 200 and 'type="password"' in form.text
    assert form.headers["X-Frame-Options"] == "DENY"


def test_login_sets_a_protected_cookie_and_logout_ends_the_session(base: str,
                                                                  store_url: str) -> None:
    anon = requests.Session()
    wrong = anon.post(f"{base}/login", data={"name": "tom", "password": "not it at all"},
                      allow_redirects=False)
    assert wrong.status_code == 401 and "Wrong name or password" in wrong.text
    assert "Set-Cookie" not in wrong.headers
    good = anon.post(f"{base}/login", data={"name": "tom", "password": PASSWORDS["tom"],
                                            "next": "//elsewhere.example/"},
                     allow_redirects=False)
    cookie = good.headers["Set-Cookie"]
    assert good.headers["Location"] == "/"  # never sent to another site
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie and "Path=/" in cookie
    token = anon.cookies["fleetdb_session"]
    assert anon.get(f"{base}/").status_code == 200
    shell = anon.get(f"{base}/_dash-layout").text
    assert "tom (technician)" in shell and ids.APP_LOGOUT in shell
    with db.get_engine(store_url).connect() as conn:
        stored = conn.execute(text("SELECT token_sha256 FROM user_session")).scalars().all()
    assert token not in stored and len(stored) == 1  # only the token's hash is kept
    out = anon.post(f"{base}/logout", allow_redirects=False)
    assert out.status_code == 302 and out.headers["Location"] == "/login"
    again = requests.Session()
    again.cookies.set("fleetdb_session", token)
    assert again.get(f"{base}/_dash-layout").status_code == 401


def test_a_technician_posting_a_planners_callback_gets_403_and_nothing_is_written(
        base: str, store_url: str) -> None:
    tom = login(base, "tom")
    refused = post_callback(tom, base, ids.PLAN_STATE, PLAN_COMMIT,
                            f"{ids.PLAN_COMMIT}.n_clicks")
    assert refused.status_code == 403 and "plan" in refused.json()["error"]
    assert count(store_url, "overhaul_plan") == 0
    export = post_callback(tom, base, ids.BOARD_DOWNLOAD, {f"{ids.BOARD_EXPORT}.n_clicks": 1},
                           f"{ids.BOARD_EXPORT}.n_clicks")
    assert export.status_code == 403
    # Trying a plan (no write) is reading: allowed.
    tried = post_callback(tom, base, ids.PLAN_STATE, PLAN_COMMIT, f"{ids.PLAN_TRY}.n_clicks")
    assert tried.status_code == 200 and count(store_url, "overhaul_plan") == 0
    # The planner may commit; the plan and its trail name the user and the address.
    pat = login(base, "pat")
    done = post_callback(pat, base, ids.PLAN_STATE, PLAN_COMMIT, f"{ids.PLAN_COMMIT}.n_clicks")
    assert done.status_code == 200, done.text[:400]
    with db.get_engine(store_url).connect() as conn:
        plan = conn.execute(text("SELECT created_by FROM overhaul_plan")).all()
        event = conn.execute(text("SELECT user_name, origin FROM audit_event WHERE action = "
                                  "'plan.commit'")).all()
    assert [tuple(r) for r in plan] == [("pat",)]  # not the typed "someone"
    assert [tuple(r) for r in event] == [("pat", "web:127.0.0.1")]


def test_a_manager_cannot_log_and_a_technician_logs_as_themself(base: str,
                                                                 store_url: str) -> None:
    before = count(store_url, "test")
    meg = login(base, "meg")
    refused = post_callback(meg, base, ids.LOG_SAVE_RESULT, log_values("2500", ["150"] * 4),
                            f"{ids.LOG_SAVE}.n_clicks")
    assert refused.status_code == 403 and count(store_url, "test") == before
    nav = post_callback(meg, base, ids.NAV, {f"{ids.APP_URL}.pathname": "/"},
                        f"{ids.APP_URL}.pathname").text
    assert "Log a test" not in nav and "Audit trail" in nav
    tom = login(base, "tom")
    saved = post_callback(tom, base, ids.LOG_SAVE_RESULT, log_values("2500", ["150"] * 4),
                          f"{ids.LOG_SAVE}.n_clicks")
    assert saved.status_code == 200 and "Saved as test" in saved.text, saved.text[:1500]
    assert count(store_url, "test") == before + 1
    last = audit.unit_trail(db.get_engine(store_url), "T-101")[-1]
    assert (last["user"], last["origin"], last["action"]) == ("tom", "web:127.0.0.1",
                                                              "test.log")


def _void(client: requests.Session, base: str, test_id: int) -> requests.Response:
    return post_callback(client, base, ids.TRAIL_VOID_RESULT,
                         {f"{ids.TRAIL_VOID}.n_clicks": 1, f"{ids.TRAIL_VOID_TEST}.value": test_id,
                          f"{ids.TRAIL_VOID_REASON}.value": "gauge hose leaked",
                          f"{ids.TRAIL_PICK}.value": "T-101"},
                         f"{ids.TRAIL_VOID}.n_clicks")


def test_a_technician_voids_only_their_own_tests(base: str, store_url: str) -> None:
    engine = db.get_engine(store_url)
    with access.acting_as(access.Actor("tia", "web:192.0.2.1", "technician")):
        from fleetdb import logbook

        theirs = logbook.log_test(engine, "T-101", "2025-06-02 08:00", 2600, [
            logbook.TypedReading("compression", c, "150", "psi") for c in range(1, 5)])
    tom = login(base, "tom")
    refused = _void(tom, base, theirs)
    assert refused.status_code == 200 and "may void only the tests they logged" in refused.text
    assert count(store_url, "test_void") == 0
    meg = login(base, "meg")
    assert _void(meg, base, theirs).status_code == 403  # a manager may not void at all
    tia = login(base, "tia")
    done = _void(tia, base, theirs)
    assert done.status_code == 200 and f"Voided test {theirs}" in done.text
    with engine.connect() as conn:
        voided = conn.execute(text("SELECT test_id, voided_by FROM test_void")).all()
    assert [tuple(r) for r in voided] == [(theirs, "tia")]


def test_a_post_from_another_site_is_refused(base: str, store_url: str) -> None:
    pat = login(base, "pat")
    deps = pat.get(f"{base}/_dash-dependencies").json()
    body = callback_body(deps, ids.PLAN_STATE, PLAN_COMMIT, f"{ids.PLAN_COMMIT}.n_clicks")
    reply = pat.post(f"{base}/_dash-update-component", json=body,
                     headers={"Origin": "http://elsewhere.example"})
    assert reply.status_code == 403 and count(store_url, "overhaul_plan") == 0
    same = pat.post(f"{base}/_dash-update-component", json=body, headers={"Origin": base})
    assert same.status_code == 200 and count(store_url, "overhaul_plan") == 1


def test_a_disabled_user_is_out_at_once(base: str, store_url: str) -> None:
    tom = login(base, "tom")
    assert tom.get(f"{base}/_dash-layout").status_code == 200
    with access.acting_as(access.Actor("ada", "web:127.0.0.1", "admin")):
        users.set_enabled(db.get_engine(store_url), "tom", False)
    assert tom.get(f"{base}/_dash-layout").status_code == 401


def test_without_login_every_request_acts_as_the_local_user(store_url: str) -> None:
    with served(create_app(store_url, auth=False), "dash-no-login") as base:
        anon = requests.Session()
        assert anon.get(f"{base}/").status_code == 200
        assert anon.get(f"{base}/login", allow_redirects=False).status_code == 302
        assert "No login: this computer only" in anon.get(f"{base}/_dash-layout").text


def run(args: list[str], code: int) -> str:
    result = CliRunner().invoke(cli, args, catch_exceptions=False)
    assert result.exit_code == code, result.output
    return result.output


@pytest.mark.parametrize(("host", "loopback"), [
    ("127.0.0.1", True), ("127.0.0.2", True), ("::1", True), ("localhost", True),
    ("0.0.0.0", False), ("192.168.1.20", False), ("::", False), ("shop-pc", False)])
def test_loopback_addresses(host: str, loopback: bool) -> None:
    assert users.is_loopback(host) is loopback


def test_serve_refuses_what_would_expose_the_store(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    migrate.upgrade(url)
    assert "--no-auth" in run(["serve", "--db", url, "--host", "0.0.0.0", "--no-auth"], 1)
    assert "no enabled admin" in run(["serve", "--db", url, "--host", "0.0.0.0"], 1)
    assert "no enabled user" in run(["serve", "--db", url], 1)
    engine = db.get_engine(url)
    users.add_user(engine, "tom", "technician", PASSWORDS["tom"])
    assert "no enabled admin" in run(["serve", "--db", url, "--host", "192.168.1.20"], 1)
    users.add_user(engine, "ada", "admin", PASSWORDS["ada"])
    users.check_serve(engine, "0.0.0.0", False)  # now allowed
    engine.dispose()


def test_a_manager_cannot_upload_or_save_a_capture(base: str) -> None:
    meg = login(base, "meg")
    upload = post_callback(meg, base, ids.LOG_CAPTURE_KEY,
                           {f"{ids.LOG_CAPTURE_UPLOAD}.contents": "data:text/csv;base64,dCxwMQo=",
                            f"{ids.LOG_CAPTURE_UPLOAD}.filename": "c.csv"},
                           f"{ids.LOG_CAPTURE_UPLOAD}.contents")
    assert upload.status_code == 403
    save = post_callback(meg, base, ids.LOG_CAPTURE_SAVE_RESULT,
                         {f"{ids.LOG_CAPTURE_SAVE}.n_clicks": 1},
                         f"{ids.LOG_CAPTURE_SAVE}.n_clicks")
    assert save.status_code == 403
