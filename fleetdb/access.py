"""Who is acting, and what each role may do.

Every write in fleetdb knows its actor: a name, where the request came from (``origin``)
and, for a dashboard user who logged in, a role. The actor lives in a context variable set
by the edge: the ``fleetdb`` command sets one for the run (``cli:<login>@<host>``), the
dashboard one per request (the user and their remote address). Library write functions read
it with :func:`current`, check rights with :func:`require` and record it in the audit trail.

An actor without a role is trusted: the command line (whoever can open the database can
change it anyway: file permissions for SQLite, credentials for PostgreSQL) and the dashboard
served with ``--no-auth`` on this computer only.
"""

from __future__ import annotations

import getpass
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar, Token
from dataclasses import dataclass

from fleetdb.errors import FleetDBError

#: The roles, from the least rights to the most (the manager reads and exports only).
ROLES: tuple[str, ...] = ("technician", "planner", "manager", "admin")

#: Every right a role can hold, with what it allows.
RIGHTS: dict[str, str] = {
    "read": "read the board, unit histories, fleet wear, plans and audit trails",
    "log_test": "log tests (form, CSV tests file, capture)",
    "void_own": "void a test one logged oneself, with a reason",
    "void_any": "void any test, with a reason",
    "service_event": "record service work (events file)",
    "plan": "try and commit overhaul plans",
    "export": "download board, plan and trail exports",
    "fleet": "add units, sites and engine families (fleet file)",
    "limits": "change an engine family's limits",
    "users": "add, disable users and set passwords",
}

_TECHNICIAN = frozenset({"read", "log_test", "void_own"})
_PLANNER = _TECHNICIAN | {"service_event", "plan", "export"}
#: What each role may do. Technician < planner < admin are cumulative; the manager reads
#: everything and exports, and writes nothing.
ROLE_RIGHTS: dict[str, frozenset[str]] = {
    "technician": _TECHNICIAN,
    "planner": frozenset(_PLANNER),
    "manager": frozenset({"read", "export"}),
    "admin": frozenset(RIGHTS),
}


class NotAllowed(FleetDBError):
    """The acting user's role does not allow this."""


@dataclass(frozen=True)
class Actor:
    """Who makes a request, from where, and with which role (None: trusted, no check)."""

    name: str
    origin: str
    role: str | None = None

    def may(self, right: str) -> bool:
        """Whether this actor holds ``right`` (a trusted actor holds every right)."""
        if right not in RIGHTS:
            raise ValueError(f"unknown right {right!r}")
        return self.role is None or right in ROLE_RIGHTS.get(self.role, frozenset())


_current: ContextVar[Actor | None] = ContextVar("fleetdb_actor", default=None)


def os_user() -> str:
    """The operating-system login name (``unknown`` when there is none)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def local_actor(kind: str = "local", name: str | None = None) -> Actor:
    """A trusted actor for this process: ``KIND:<login>@<host>``.

    :param kind: ``cli`` for the command, ``local`` for a Python caller.
    :param name: the name to record (default: the login name).
    """
    login = os_user()
    return Actor(name=(name or login)[:80], origin=f"{kind}:{login}@{socket.gethostname()}"[:200])


def current() -> Actor:
    """The actor of this request or run (a trusted local actor when none was set)."""
    return _current.get() or local_actor()


def set_actor(actor: Actor) -> Token:
    """Make ``actor`` current; give the token to :func:`reset_actor` afterwards."""
    return _current.set(actor)


def reset_actor(token: Token) -> None:
    """Restore the actor that was current before :func:`set_actor`."""
    _current.reset(token)


@contextmanager
def acting_as(actor: Actor) -> Iterator[Actor]:
    """``with acting_as(actor):`` every write inside is made and recorded as ``actor``."""
    token = set_actor(actor)
    try:
        yield actor
    finally:
        reset_actor(token)


def author(by: str | None = None) -> str:
    """The name a write records: a logged-in user always as themself; a trusted actor as
    ``by`` when given (``--by``; the origin still shows the real login)."""
    actor = current()
    if actor.role is not None or not by:
        return actor.name
    return by


def require(right: str, what: str) -> Actor:
    """The current actor, if it holds ``right``; else :class:`NotAllowed`.

    :param right: one of :data:`RIGHTS`.
    :param what: the action in words, for the message.
    """
    actor = current()
    if not actor.may(right):
        raise NotAllowed(f"{actor.name} ({actor.role}) may not {what}: that needs a role with "
                         f"the right to {RIGHTS[right]} ({', '.join(roles_with(right))})")
    return actor


def roles_with(right: str) -> list[str]:
    """The roles that hold ``right``, in role order."""
    return [role for role in ROLES if right in ROLE_RIGHTS[role]]
