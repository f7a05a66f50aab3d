"""Users, roles, passwords, sessions and the audit trail, on SQLite and PostgreSQL."""

from __future__ import annotations

import json
import time
from datetime import timedelta
from pathlib import Path

import pytest
from click.testing import CliRunner
from sqlalchemy import text
from sqlalchemy.engine import Engine

from fleetdb import access, audit, logbook, users
from fleetdb.cli import cli
from fleetdb.errors import FleetDBError
from fleetdb.ingest import import_files
from tests.conftest import DATA

# -- passwords against RFC 7914 ----------------------------------------------------------

# RFC 7914 "The scrypt Password-Based Key Derivation Function", section 12 (Test Vectors):
# (P, S, N, r, p, dkLen) and the derived key. The fourth vector (N = 2^20, 1 GiB) is left out.
RFC7914_VECTORS = [
    (b"", b"", 16, 1, 1, 64,
     "77d6576238657b203b19ca42c18a0497f16b4844e3074ae8dfdffa3fede21442"
     "fcd0069ded0948f8326a753a0fc81f17e8d3e0fb2e0d3628cf35e20c38d18906"),
    (b"password", b"NaCl", 1024, 8, 16, 64,
     "fdbabe1c9d3472007856e7190d01e9fe7c6ad7cbc8237830e77376634b373162"
     "2eaf30d92e22a3886ff109279d9830dac727afb94a83ee6d8360cbdfa2cc0640"),
    (b"pleaseletmein", b"SodiumChloride", 16384, 8, 1, 64,
     "7023bdcb3afd7348461c06cd81fd38ebfda8fbba904f8e3ea9b543f6545da1f2"
     "d5432955613f0fcf62d49705242a9af9e61e85dc0d651e40dfcf017b45575887"),
]


@pytest.mark.parametrize(("password", "salt", "n", "r", "p", "dklen", "expected"),
                         RFC7914_VECTORS)
def test_scrypt_key_matches_rfc7914_vectors(password: bytes, salt: bytes, n: int, r: int,
                                            p: int, dklen: int, expected: str) -> None:
    assert users.scrypt_key(password, salt, n, r, p, dklen).hex() == expected


def test_stored_hash_carries_its_parameters_and_verifies() -> None:
    stored = users.hash_password("correct horse")
    scheme, params, salt, key = stored.split("$")
    assert (scheme, params) == ("scrypt", f"n={2**15},r=8,p=1")
    assert len(users._unb64(salt)) == 16 and len(users._unb64(key)) == 32
    assert users.verify_password("correct horse", stored)
    assert not users.verify_password("correct horsf", stored)
    assert users.hash_password("correct horse") != stored  # a new salt each time
    cheap = users.hash_password("correct horse", n=2**10)
    assert users.verify_password("correct horse", cheap) and users.needs_rehash(cheap)
    assert not users.needs_rehash(stored)


@pytest.mark.parametrize("password", ["", "1234567", "x" * 1025, "nul\x00inside"])
def test_bad_passwords_are_refused(password: str) -> None:
    with pytest.raises(FleetDBError):
        users.hash_password(password)


# -- the user commands ---------------------------------------------------------------------

def run(args: list[str], db: str, code: int = 0, stdin: str | None = None) -> str:
    result = CliRunner().invoke(cli, [*args, "--db", db], input=stdin, catch_exceptions=False)
    assert result.exit_code == code, result.output
    assert "Traceback" not in result.output
    return result.output


@pytest.fixture
def store(db_url: str) -> str:
    run(["init"], db_url)
    run(["import", str(DATA / "fleet.csv"), str(DATA / "tests.csv")], db_url)
    return db_url


def test_user_commands(store: str) -> None:
    out = run(["user", "add", "ana", "--role", "admin", "--password-stdin"], store,
              stdin="first pass word\n")
    assert out == "Added ana as admin.\n"
    # The hidden prompt asks twice; two different entries are asked again.
    out = run(["user", "add", "ben", "--role", "technician"], store,
              stdin="bens password\nbens passwurd\nbens password\nbens password\n")
    assert "Repeat password" in out and "do not match" in out and "Added ben" in out
    assert "bens password" not in out
    rows = json.loads(run(["user", "list", "--json"], store))
    assert [(r["name"], r["role"], r["enabled"]) for r in rows] == [
        ("ana", "admin", True), ("ben", "technician", True)]
    assert "already" in run(["user", "add", "ben", "--role", "planner", "--password-stdin"],
                            store, 1, "another pass\n")
    assert "unknown role" not in run(["user", "add", "cy", "--role", "boss"], store, 2)
    assert "at least 8" in run(["user", "add", "cy", "--role", "manager", "--password-stdin"],
                               store, 1, "short\n")
    assert "last enabled admin" in run(["user", "disable", "ana"], store, 1)
    assert "Disabled ben" in run(["user", "disable", "ben"], store)
    assert "no user named 'zed'" in run(["user", "disable", "zed"], store, 1)
    run(["user", "passwd", "ben", "--password-stdin"], store, stdin="a new password\n")
    engine = _engine(store)
    assert users.log_in(engine, "ben", "a new password", "127.0.0.1") is None  # disabled
    run(["user", "enable", "ben"], store)
    assert users.log_in(engine, "ben", "a new password", "127.0.0.1") is not None
    with engine.connect() as conn:
        hashes = [h for (h,) in conn.execute(text("SELECT password_hash FROM app_user"))]
    assert all(h.startswith("scrypt$") and "password" not in h for h in hashes)
    engine.dispose()


def _engine(url: str) -> Engine:
    from fleetdb import db

    return db.make_engine(url)


# -- sessions ----------------------------------------------------------------------------

def test_sessions_expire_end_and_lock(engine: Engine) -> None:
    users.add_user(engine, "dee", "planner", "planner pass")
    assert users.log_in(engine, "dee", "wrong pass", "10.0.0.9") is None
    assert users.log_in(engine, "nobody", "planner pass", "10.0.0.9") is None
    token, user = users.log_in(engine, "dee", "planner pass", "10.0.0.9")
    assert (user.name, user.role) == ("dee", "planner")
    assert users.session_user(engine, token).name == "dee"
    assert users.session_user(engine, token + "x") is None
    assert users.session_user(engine, None) is None
    # Idle and absolute limits: a session older than either is ended for good.
    short = users.SessionLimits(idle=timedelta(seconds=1), absolute=timedelta(hours=1))
    time.sleep(2.1)
    assert users.session_user(engine, token, short) is None
    assert users.session_user(engine, token) is None  # ended in the store
    token2, _ = users.log_in(engine, "dee", "planner pass", "10.0.0.9")
    assert users.session_user(engine, token2, users.SessionLimits(
        idle=timedelta(hours=1), absolute=timedelta(seconds=0))) is None
    token3, _ = users.log_in(engine, "dee", "planner pass", "10.0.0.9")
    users.log_out(engine, token3)
    assert users.session_user(engine, token3) is None
    # A new password ends the open sessions.
    token4, _ = users.log_in(engine, "dee", "planner pass", "10.0.0.9")
    users.set_password(engine, "dee", "second pass")
    assert users.session_user(engine, token4) is None
    # Five failures lock the name, even for the right password, until the window passes.
    for _ in range(users.LOCKOUT_FAILURES):
        assert users.log_in(engine, "dee", "guess guess", "10.0.0.66") is None
    assert users.log_in(engine, "dee", "second pass", "10.0.0.9") is None
    with engine.connect() as conn:
        failed = conn.execute(text("SELECT COUNT(*) FROM audit_event WHERE action = "
                                   "'login.failed'")).scalar()
        ends = conn.execute(text("SELECT COUNT(*) FROM user_session WHERE ended_at IS NULL"
                                 )).scalar()
    assert failed == 2 + users.LOCKOUT_FAILURES + 1 and ends == 0


def test_an_old_cheap_hash_is_raised_at_login(engine: Engine) -> None:
    users.add_user(engine, "eve", "manager", "manager pass")
    cheap = users.hash_password("manager pass", n=2**10)
    with engine.begin() as conn:
        conn.execute(text("UPDATE app_user SET password_hash = :h"), {"h": cheap})
    assert users.log_in(engine, "eve", "manager pass", "127.0.0.1") is not None
    with engine.connect() as conn:
        stored = conn.execute(text("SELECT password_hash FROM app_user")).scalar()
    assert stored.startswith(f"scrypt$n={2**15},") and users.verify_password("manager pass",
                                                                              stored)


# -- rights in the library, and the trail ----------------------------------------------------

def _web(name: str, role: str) -> access.Actor:
    return access.Actor(name=name, origin="web:192.0.2.7", role=role)


def _reading() -> list[logbook.TypedReading]:
    return [logbook.TypedReading("compression", c, "150", "psi") for c in range(1, 5)]


def test_rights_are_checked_in_the_library_and_every_write_is_in_the_trail(
        engine: Engine, tmp_path: Path) -> None:
    import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"], by="importer")
    with access.acting_as(_web("tom", "technician")):
        own = logbook.log_test(engine, "T-101", "2025-06-01 08:00", 2500, _reading(),
                               by="somebody else")  # a logged-in user is always themself
        with pytest.raises(access.NotAllowed, match="only the tests they logged"):
            logbook.void_test(engine, 1, "looks wrong")
        logbook.void_test(engine, own, "hose leaked")
        with pytest.raises(access.NotAllowed, match="events file"):
            import_files(engine, [DATA / "events.csv"])
    with access.acting_as(_web("meg", "manager")), pytest.raises(access.NotAllowed):
        logbook.log_test(engine, "T-101", "2025-06-02 08:00", 2510, _reading())
    with access.acting_as(_web("pat", "planner")):
        with pytest.raises(access.NotAllowed):
            logbook.void_test(engine, 1, "not mine")
        with pytest.raises(access.NotAllowed):
            users.add_user(engine, "x1", "admin", "some password")
        import_files(engine, [DATA / "events.csv"])
    with access.acting_as(_web("ada", "admin")):
        logbook.void_test(engine, 1, "gauge not zeroed")
    with engine.connect() as conn:
        logged_by = conn.execute(text("SELECT created_by FROM test WHERE id = :i"),
                                 {"i": own}).scalar()
        voids = conn.execute(text("SELECT test_id, voided_by FROM test_void ORDER BY test_id"
                                  )).all()
        fleet_no = conn.execute(text("SELECT u.fleet_no FROM test t JOIN unit u ON "
                                     "u.id = t.unit_id WHERE t.id = 1")).scalar()
    assert logged_by == "tom" and [tuple(v) for v in voids] == [(1, "ada"), (own, "tom")]
    trail = audit.unit_trail(engine, "T-101")
    steps = [(e["user"], e["origin"].split(":")[0], e["action"]) for e in trail]
    assert steps[:2] == [("importer", "local", "import"), ("importer", "local", "import")]
    assert ("tom", "web", "test.log") in steps and ("tom", "web", "test.void") in steps
    assert [e["at"] for e in trail] == sorted(e["at"] for e in trail)
    assert [e["event_id"] for e in trail] == sorted(e["event_id"] for e in trail)
    assert all(e["origin"] == "web:192.0.2.7" for e in trail if e["user"] == "tom")
    if fleet_no == "T-101":
        assert ("ada", "web", "test.void") in steps
    log = next(e for e in trail if e["action"] == "test.log")
    assert log["detail"]["test_ids"] == [own]
    with pytest.raises(FleetDBError, match="no unit"):
        audit.unit_trail(engine, "NOPE")


def test_trail_command_and_cli_origin(store: str) -> None:
    run(["log", "T-101", "--at", "2025-06-01 08:00", "--hours", "2500", "--compression",
         "150,150,150,150", "--by", "AK"], store)
    out = json.loads(run(["trail", "T-101", "--json"], store))
    last = out["events"][-1]
    assert out["fleet_no"] == "T-101" and last["action"] == "test.log"
    assert last["user"] == "AK" and last["origin"].startswith(f"cli:{access.os_user()}@")
    table = run(["trail", "T-101"], store)
    assert "test.log" in table and "import" in table and "cli:" in table
    assert "no unit" in run(["trail", "NOPE"], store, 1)
    # The command line's actor does not leak out of the command.
    assert access.current().origin.startswith("local:")


def test_upgrading_a_store_gives_earlier_writes_a_trail(db_url: str) -> None:
    """Rows written before revision 0007 get trail events (author and time as stored)."""
    from fleetdb import db, migrate

    migrate.upgrade(db_url)
    engine = db.make_engine(db_url)
    import_files(engine, [DATA / "fleet.csv", DATA / "tests.csv"], by="old-importer")
    logbook.void_test(engine, 1, "gauge hose leaked", by="old-voider")
    engine.dispose()
    migrate.downgrade(db_url, "0006")  # back to before the trail: its tables go
    migrate.upgrade(db_url)
    engine = db.make_engine(db_url)
    with engine.connect() as conn:
        unit_of_test_1 = conn.execute(text("SELECT u.fleet_no FROM test t JOIN unit u ON "
                                           "u.id = t.unit_id WHERE t.id = 1")).scalar()
    trail = audit.unit_trail(engine, unit_of_test_1)
    engine.dispose()
    assert [(e["user"], e["action"]) for e in trail] == [
        ("old-importer", "import"), ("old-importer", "import"), ("old-voider", "test.void")]
    assert {e["origin"] for e in trail} == {"before the audit trail (origin not kept)"}
    assert "gauge hose leaked" in trail[-1]["summary"]


def test_limit_changes_need_an_admin_and_reach_the_trail_of_every_unit_of_the_family(
        engine: Engine) -> None:
    from fleetdb import registry

    import_files(engine, [DATA / "fleet.csv"], by="importer")
    with access.acting_as(_web("pat", "planner")), pytest.raises(access.NotAllowed):
        registry.set_limits(engine, "TEST-L4", {"min_compression": "125 psi"}, reason="x")
    with access.acting_as(_web("ada", "admin")):
        registry.set_limits(engine, "TEST-L4", {"min_compression": "125 psi"},
                            reason="service data, 2025 edition", by="someone else")
    trail = audit.unit_trail(engine, "T-101")  # a TEST-L4 unit (tests/data/fleet.csv)
    change = trail[-1]
    assert (change["user"], change["origin"], change["action"]) == ("ada", "web:192.0.2.7",
                                                                    "limits.change")
    assert "service data, 2025 edition" in change["summary"]
    assert change["detail"]["changed"] == ["min_compression_kpa"]
    assert "limits.change" not in [e["action"] for e in audit.unit_trail(engine, "T-201")]
