"""Typed errors raised by the library; the CLI and dashboard translate them."""

from __future__ import annotations

from dataclasses import dataclass


class FleetDBError(Exception):
    """Base of every error fleetdb raises on purpose."""


class InvalidValue(FleetDBError, ValueError):
    """A single value that cannot be accepted (unit, number, date...)."""


class UnitNotFound(FleetDBError):
    """No unit has this fleet number."""


class SchemaOutOfDate(FleetDBError):
    """The database is not at the newest schema revision."""


@dataclass(frozen=True)
class Problem:
    """One problem found in an input, located precisely."""

    source: str  # file name, or "form" / "command line"
    line: int | None  # 1-based line in the file (header is line 1)
    field: str | None
    message: str

    def __str__(self) -> str:
        where = self.source
        if self.line is not None:
            where += f", line {self.line}"
        if self.field:
            where += f", column {self.field}"
        return f"{where}: {self.message}"


class InvalidInput(FleetDBError):
    """An input with one or more problems; nothing of it was written."""

    def __init__(self, problems: list[Problem]):
        self.problems = problems
        shown = "\n".join(f"  {p}" for p in problems[:50])
        more = f"\n  ... and {len(problems) - 50} more" if len(problems) > 50 else ""
        super().__init__(f"{len(problems)} problem(s), nothing written:\n{shown}{more}")
