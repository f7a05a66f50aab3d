"""The ``fleetdb user ...`` and ``fleetdb trail`` commands (registered in :mod:`fleetdb.cli`).

Thin over :mod:`fleetdb.users` and :mod:`fleetdb.audit`. The command line acts with the rights
of whoever can open the database; it records the login name and host as the origin.
"""

from __future__ import annotations

import sys

import click

from fleetdb.cli import _engine, db_option, friendly_errors, json_option, print_json, print_table

__all__ = ["trail", "user"]


def _read_password(from_stdin: bool) -> str:
    """The new password: one line of standard input, or typed twice at a hidden prompt."""
    if from_stdin:
        line = sys.stdin.readline()
        return line[:-1] if line.endswith("\n") else line
    return click.prompt("Password", hide_input=True, confirmation_prompt="Repeat password")


def _password_stdin_option(func):  # noqa: ANN001, ANN202 - click decorator
    return click.option("--password-stdin", is_flag=True,
                        help="Read the password from the first line of standard input "
                             "(for scripts) instead of a hidden prompt.")(func)


@click.group()
def user() -> None:
    """Dashboard users and their roles: technician, planner, manager, admin.

    \b
    technician  logs tests, voids the tests they logged (with a reason)
    planner     as technician, plus overhaul plans, service work and exports
    manager     reads everything and exports; logs and changes nothing
    admin       everything: users, engine family limits, fleet files, any void

    \b
    Example:
        fleetdb user add ana --role admin
        fleetdb user list
    """


@user.command(name="add")
@click.argument("name")
@click.option("--role", required=True,
              type=click.Choice(["technician", "planner", "manager", "admin"]),
              help="What the user may do.")
@_password_stdin_option
@db_option
@friendly_errors
def add(name: str, role: str, password_stdin: bool, db: str | None) -> None:
    """Add a user with a role; asks for the password twice (hidden).

    \b
    Example:
        fleetdb user add ana --role admin
        printf '%s\\n' "$PASSWORD" | fleetdb user add ben --role technician --password-stdin
    """
    from fleetdb import users

    engine = _engine(db)
    added = users.add_user(engine, name, role, _read_password(password_stdin))
    click.echo(f"Added {added.name} as {added.role}.")


@user.command(name="list")
@json_option
@db_option
@friendly_errors
def list_(as_json: bool, db: str | None) -> None:
    """List every user, enabled or not, with their role.

    \b
    Example:
        fleetdb user list
    """
    from fleetdb import users

    rows = [{"name": u.name, "role": u.role, "enabled": u.enabled,
             "created_at": u.created_at.isoformat(timespec="seconds"),
             "changed_at": u.changed_at.isoformat(timespec="seconds")}
            for u in users.list_users(_engine(db))]
    if as_json:
        print_json(rows)
        return
    print_table([{**r, "enabled": "yes" if r["enabled"] else "no (disabled)"} for r in rows],
                [("name", "name"), ("role", "role"), ("enabled", "enabled"),
                 ("created_at", "added (UTC)"), ("changed_at", "changed (UTC)")])


@user.command()
@click.argument("name")
@db_option
@friendly_errors
def disable(name: str, db: str | None) -> None:
    """Disable a user: they can no longer log in and their sessions end. Nothing is deleted.

    \b
    Example:
        fleetdb user disable ben
    """
    from fleetdb import users

    users.set_enabled(_engine(db), name, False)
    click.echo(f"Disabled {name}; their open sessions ended.")


@user.command()
@click.argument("name")
@db_option
@friendly_errors
def enable(name: str, db: str | None) -> None:
    """Enable a disabled user again.

    \b
    Example:
        fleetdb user enable ben
    """
    from fleetdb import users

    users.set_enabled(_engine(db), name, True)
    click.echo(f"Enabled {name}.")


@user.command()
@click.argument("name")
@_password_stdin_option
@db_option
@friendly_errors
def passwd(name: str, password_stdin: bool, db: str | None) -> None:
    """Set a user's password (asked twice, hidden); their open sessions end.

    \b
    Example:
        fleetdb user passwd ben
    """
    from fleetdb import users

    engine = _engine(db)
    users.set_password(engine, name, _read_password(password_stdin))
    click.echo(f"New password set for {name}; their open sessions ended.")


@click.command()
@click.argument("fleet_no")
@json_option
@db_option
@friendly_errors
def trail(fleet_no: str, as_json: bool, db: str | None) -> None:
    """A unit's audit trail: every write that touched it, oldest first, with who and from where.

    \b
    Example:
        fleetdb trail LT-07 --json
    """
    from fleetdb import audit

    rows = audit.unit_trail(_engine(db), fleet_no)
    if as_json:
        print_json({"fleet_no": fleet_no, "events": rows})
        return
    print_table(rows, [("at", "when (UTC)"), ("user", "who"), ("origin", "from"),
                       ("action", "action"), ("summary", "what")])
