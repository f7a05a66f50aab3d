"""Users, passwords and dashboard sessions.

Passwords are kept as scrypt keys (RFC 7914, Python's ``hashlib.scrypt``) with a random salt;
the cost parameters are stored with each hash (``scrypt$n=32768,r=8,p=1$salt$key``), so they
can be raised later: a login with an older, cheaper hash stores a new one. Keys are compared
in constant time. Users are never deleted, only disabled; every change is in the audit trail.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import func, insert, select, update
from sqlalchemy.engine import Connection, Engine

from fleetdb import access, audit
from fleetdb.config import SESSION_SETTINGS
from fleetdb.errors import FleetDBError
from fleetdb.models import AppUser, UserSession

#: scrypt cost: N = 2^15, r = 8, p = 1 takes 32 MiB and tens of milliseconds per hash
#: (the interactive-login setting of RFC 7914's section 2 discussion and OWASP's password
#: storage guidance at the time of writing, from memory).
SCRYPT_N, SCRYPT_R, SCRYPT_P = 2**15, 8, 1
KEY_BYTES, SALT_BYTES = 32, 16
#: At least 8 characters (NIST SP 800-63B, section 5.1.1.2, memorised secrets).
MIN_PASSWORD = 8
MAX_PASSWORD = 1024
#: Failed logins for one name within this window lock that name until the window passes.
LOCKOUT_FAILURES, LOCKOUT_MINUTES = 5, 15
#: Update a session's last-seen time at most this often (a write per request is not needed).
TOUCH_EVERY = timedelta(seconds=60)

_users = AppUser.__table__
_sessions = UserSession.__table__


class UnknownUser(FleetDBError):
    """No user has this name."""


@dataclass(frozen=True)
class User:
    """A user as the dashboard and the CLI see them (never the hash)."""

    id: int
    name: str
    role: str
    enabled: bool
    created_at: datetime
    changed_at: datetime


# -- passwords ---------------------------------------------------------------------------

def scrypt_key(password: bytes, salt: bytes, n: int, r: int, p: int, dklen: int) -> bytes:
    """The scrypt key of RFC 7914 (``hashlib.scrypt`` with memory enough for ``n`` and ``r``)."""
    return hashlib.scrypt(password, salt=salt, n=n, r=r, p=p, dklen=dklen,
                          maxmem=128 * r * (n + p + 2) + 1024 * 1024)


def hash_password(password: str, *, n: int = SCRYPT_N, r: int = SCRYPT_R,
                  p: int = SCRYPT_P) -> str:
    """A new salted hash of ``password`` with its parameters: ``scrypt$n=..,r=..,p=..$salt$key``."""
    check_password_text(password)
    salt = secrets.token_bytes(SALT_BYTES)
    key = scrypt_key(password.encode("utf-8"), salt, n, r, p, KEY_BYTES)
    return f"scrypt$n={n},r={r},p={p}${_b64(salt)}${_b64(key)}"


def _parse(stored: str) -> tuple[dict[str, int], bytes, bytes]:
    scheme, params, salt, key = stored.split("$")
    if scheme != "scrypt":
        raise ValueError(f"unknown password scheme {scheme!r}")
    values = {k: int(v) for k, v in (item.split("=") for item in params.split(","))}
    return values, _unb64(salt), _unb64(key)


def verify_password(password: str, stored: str) -> bool:
    """Whether ``password`` gives ``stored`` (compared in constant time)."""
    params, salt, key = _parse(stored)
    if len(password) > MAX_PASSWORD:
        return False
    given = scrypt_key(password.encode("utf-8"), salt, params["n"], params["r"], params["p"],
                       len(key))
    return hmac.compare_digest(given, key)


def needs_rehash(stored: str) -> bool:
    """Whether a stored hash is cheaper than today's parameters."""
    params, _, key = _parse(stored)
    return (params["n"], params["r"], params["p"], len(key)) < (SCRYPT_N, SCRYPT_R, SCRYPT_P,
                                                                KEY_BYTES)


def check_password_text(password: str) -> None:
    """Refuse a password shorter than :data:`MIN_PASSWORD` characters (or absurdly long)."""
    if len(password) < MIN_PASSWORD:
        raise FleetDBError(f"a password needs at least {MIN_PASSWORD} characters")
    if len(password) > MAX_PASSWORD or "\x00" in password:
        raise FleetDBError(f"a password has at most {MAX_PASSWORD} characters and no NUL")


def _b64(raw: bytes) -> str:
    return base64.b64encode(raw).decode("ascii").rstrip("=")


def _unb64(text: str) -> bytes:
    return base64.b64decode(text + "=" * (-len(text) % 4))


#: Checked when a name is unknown, so a wrong name costs as much time as a wrong password.
_DUMMY_HASH = f"scrypt$n={SCRYPT_N},r={SCRYPT_R},p={SCRYPT_P}${'A' * 22}${'A' * 43}"


# -- users -------------------------------------------------------------------------------

def _now() -> datetime:
    return datetime.now(UTC).replace(microsecond=0)


def _user(row: Any) -> User:
    return User(id=row.id, name=row.name, role=row.role, enabled=bool(row.enabled),
                created_at=row.created_at, changed_at=row.changed_at)


def _check_name(name: str) -> str:
    name = name.strip()
    if not name or len(name) > 80 or any(c.isspace() or not c.isprintable() for c in name):
        raise FleetDBError(f"a user name is 1 to 80 printable characters without spaces: "
                           f"{name!r}")
    return name


def _check_role(role: str) -> str:
    if role not in access.ROLES:
        raise FleetDBError(f"unknown role {role!r}; one of {', '.join(access.ROLES)}")
    return role


def _find(conn: Connection, name: str) -> Any:
    row = conn.execute(select(_users).where(_users.c.name == name)).first()
    if row is None:
        raise UnknownUser(f"no user named {name!r} (fleetdb user list shows them)")
    return row


def add_user(engine: Engine, name: str, role: str, password: str) -> User:
    """Add a user with a role and a password.

    :param name: the login name (unique, no spaces).
    :param role: one of :data:`fleetdb.access.ROLES`.
    :param password: at least :data:`MIN_PASSWORD` characters.
    :raises FleetDBError: a taken name, an unknown role, a short password.
    """
    access.require("users", "add users")
    name, role = _check_name(name), _check_role(role)
    hashed = hash_password(password)
    with engine.begin() as conn:
        if conn.execute(select(_users.c.id).where(_users.c.name == name)).first():
            raise FleetDBError(f"user {name!r} exists already (fleetdb user passwd, or "
                               "disable it)")
        now = _now()
        user_id = conn.execute(insert(_users).values(
            name=name, role=role, password_hash=hashed, enabled=True, created_at=now,
            changed_at=now)).inserted_primary_key[0]
        audit.record(conn, "user.add", f"added user {name} as {role}",
                     detail={"user": name, "role": role})
        return _user(conn.execute(select(_users).where(_users.c.id == user_id)).one())


def list_users(engine: Engine) -> list[User]:
    """Every user, enabled or not, by name."""
    with engine.connect() as conn:
        return [_user(r) for r in conn.execute(select(_users).order_by(_users.c.name))]


def set_enabled(engine: Engine, name: str, enabled: bool) -> User:
    """Disable (or enable again) a user; disabling ends their open sessions.

    :raises FleetDBError: disabling the last enabled admin.
    """
    access.require("users", "disable or enable users")
    with engine.begin() as conn:
        row = _find(conn, name)
        if not enabled and row.role == "admin" and row.enabled and _enabled_admins(conn) <= 1:
            raise FleetDBError(f"{name} is the last enabled admin; add another admin first")
        now = _now()
        conn.execute(update(_users).where(_users.c.id == row.id)
                     .values(enabled=enabled, changed_at=now))
        if not enabled:
            conn.execute(update(_sessions).where(_sessions.c.user_id == row.id,
                                                 _sessions.c.ended_at.is_(None))
                         .values(ended_at=now))
        verb = "enabled" if enabled else "disabled"
        audit.record(conn, f"user.{verb[:-1]}", f"{verb} user {name}", detail={"user": name})
        return _user(conn.execute(select(_users).where(_users.c.id == row.id)).one())


def set_password(engine: Engine, name: str, password: str) -> None:
    """Give a user a new password; their open sessions end.

    A logged-in user may set their own; setting another's needs the ``users`` right.
    """
    actor = access.current()
    if actor.role is not None and actor.name != name:
        access.require("users", "set another user's password")
    hashed = hash_password(password)
    with engine.begin() as conn:
        row = _find(conn, name)
        now = _now()
        conn.execute(update(_users).where(_users.c.id == row.id)
                     .values(password_hash=hashed, changed_at=now))
        conn.execute(update(_sessions).where(_sessions.c.user_id == row.id,
                                             _sessions.c.ended_at.is_(None))
                     .values(ended_at=now))
        audit.record(conn, "user.password", f"set a new password for {name}",
                     detail={"user": name})


def _enabled_admins(conn: Connection) -> int:
    return conn.execute(select(func.count()).select_from(_users).where(
        _users.c.role == "admin", _users.c.enabled.is_(True))).scalar_one()


def enabled_admins(engine: Engine) -> int:
    """How many enabled admins exist."""
    with engine.connect() as conn:
        return _enabled_admins(conn)


def enabled_users(engine: Engine) -> int:
    """How many enabled users exist."""
    with engine.connect() as conn:
        return conn.execute(select(func.count()).select_from(_users)
                            .where(_users.c.enabled.is_(True))).scalar_one()


# -- sessions ------------------------------------------------------------------------------

@dataclass(frozen=True)
class SessionLimits:
    """How long a session lasts: idle (without a request) and absolute (since the login)."""

    idle: timedelta = timedelta(minutes=SESSION_SETTINGS[0][1])
    absolute: timedelta = timedelta(hours=SESSION_SETTINGS[1][1])


def _token_digest(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def log_in(engine: Engine, name: str, password: str, remote: str) -> tuple[str, User] | None:
    """Check a name and password; on success open a session and return (token, user).

    Returns None for a wrong name or password, a disabled user, or a name locked after
    :data:`LOCKOUT_FAILURES` failures within :data:`LOCKOUT_MINUTES` minutes; each failure
    is in the audit trail (``login.failed``).

    :param remote: the client's address, kept with the session.
    """
    name = name.strip()[:80]
    with engine.connect() as conn:
        row = conn.execute(select(_users).where(_users.c.name == name)).first()
        since = _now() - timedelta(minutes=LOCKOUT_MINUTES)
        failures = audit.count_actions(conn, "login.failed", name, since)
    stored = row.password_hash if row is not None else _DUMMY_HASH
    good = verify_password(password, stored) and row is not None
    actor = access.Actor(name=name or "?", origin=f"web:{remote}"[:200])
    with access.acting_as(actor), engine.begin() as conn:
        if not good or not row.enabled or failures >= LOCKOUT_FAILURES:
            why = ("locked after repeated failures" if failures >= LOCKOUT_FAILURES else
                   "wrong name or password" if not good else "user disabled")
            audit.record(conn, "login.failed", f"login refused for {name!r}: {why}",
                         detail={"user": name, "why": why})
            return None
        token = secrets.token_urlsafe(32)
        now = _now()
        conn.execute(insert(_sessions).values(
            token_sha256=_token_digest(token), user_id=row.id, remote=remote[:64],
            created_at=now, last_seen_at=now, ended_at=None))
        if needs_rehash(row.password_hash):
            conn.execute(update(_users).where(_users.c.id == row.id)
                         .values(password_hash=hash_password(password)))
        return token, _user(row)


def session_user(engine: Engine, token: str | None,
                 limits: SessionLimits = SessionLimits()) -> User | None:
    """The enabled user of an open session, or None (unknown, ended, idle or too old).

    A session past a limit is ended in the store; a live one has its last-seen time moved on.
    """
    if not token:
        return None
    now = _now()
    with engine.connect() as conn:
        row = conn.execute(select(_sessions, _users.c.name, _users.c.role, _users.c.enabled,
                                  _users.c.changed_at)
                           .join(_users, _users.c.id == _sessions.c.user_id)
                           .where(_sessions.c.token_sha256 == _token_digest(token))).first()
        if row is None or row.ended_at is not None:
            return None
        expired = (now - row.last_seen_at >= limits.idle or now - row.created_at >=
                   limits.absolute or not row.enabled)
        if expired or now - row.last_seen_at >= TOUCH_EVERY:
            values = {"ended_at": now} if expired else {"last_seen_at": now}
            conn.execute(update(_sessions).where(_sessions.c.id == row.id).values(**values))
            conn.commit()
        if expired:
            return None
        return User(id=row.user_id, name=row.name, role=row.role, enabled=True,
                    created_at=row.created_at, changed_at=row.changed_at)


def log_out(engine: Engine, token: str | None) -> None:
    """End the session of ``token`` (nothing when it is unknown or ended)."""
    if not token:
        return
    with engine.begin() as conn:
        conn.execute(update(_sessions).where(_sessions.c.token_sha256 == _token_digest(token),
                                             _sessions.c.ended_at.is_(None))
                     .values(ended_at=_now()))


# -- who may serve where ---------------------------------------------------------------------

def is_loopback(host: str) -> bool:
    """Whether ``host`` is this computer only (127.0.0.0/8, ::1, ``localhost``)."""
    import ipaddress

    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False  # a name other than localhost may resolve anywhere


def check_serve(engine: Engine, host: str, no_auth: bool) -> None:
    """Refuse a dashboard that others could reach without the protection it needs.

    * ``no_auth`` only on loopback;
    * beyond loopback, at least one enabled admin must exist (someone who can manage users);
    * with login on, at least one enabled user (else nobody could log in).

    :raises FleetDBError: saying what to do instead.
    """
    if no_auth:
        if not is_loopback(host):
            raise FleetDBError(f"--no-auth serves without login and is allowed on this "
                               f"computer only (--host 127.0.0.1), not on {host}")
        return
    if not is_loopback(host) and enabled_admins(engine) == 0:
        raise FleetDBError(f"refusing to listen on {host}: no enabled admin exists. Add one "
                           "first (fleetdb user add NAME --role admin), or serve on "
                           "127.0.0.1")
    if enabled_users(engine) == 0:
        raise FleetDBError("no enabled user can log in: add one (fleetdb user add NAME --role "
                           "admin), or serve without login on this computer only (--no-auth)")
