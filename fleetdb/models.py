"""The store's tables (SQLModel). Alembic migrations in migrations/ create and change them.

Values are kept in SI (kPa gauge, kPa below ambient, percent) beside the text the user
typed and its unit. Nothing is deleted: a wrong test gets a :class:`TestVoid` row.
"""

from __future__ import annotations

from datetime import UTC, date, datetime

from sqlalchemy import (
    CheckConstraint,
    Column,
    DateTime,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
    text,
)
from sqlmodel import Field, SQLModel

# Named constraints from the first revision on, so SQLite batch migrations can drop them.
SQLModel.metadata.naming_convention = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}
metadata: MetaData = SQLModel.metadata

FUELS = ("gasoline", "lpg", "cng", "diesel")
READING_KINDS = ("compression", "wet", "leakdown", "relative", "vacuum_cranking", "vacuum_idle")
CYLINDER_KINDS = ("compression", "wet", "leakdown", "relative")
VACUUM_KINDS = ("vacuum_cranking", "vacuum_idle")
EVENT_KINDS = (
    "overhaul", "head", "valves", "rings", "throttle", "control_module", "hour_meter", "other",
)
SPREAD_RULES = ("ratio", "diff", "ratio_mean")
LIMIT_SOURCES = ("migration", "import", "cli")
SOURCES = ("form", "cli", "csv", "capture", "demo")


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


def _utcnow() -> datetime:
    return datetime.now(UTC).replace(microsecond=0)


class Site(SQLModel, table=True):
    """A depot or yard; its elevation gives the standard-atmosphere barometer."""

    __tablename__ = "site"
    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(sa_column=Column(String(80), unique=True, nullable=False))
    elevation_m: float = Field(default=0.0)
    created_at: datetime = Field(default_factory=_utcnow)


class EngineFamily(SQLModel, table=True):
    """Engines that share layout and limits; limits override fleetdb's defaults."""

    __tablename__ = "engine_family"
    __table_args__ = (
        CheckConstraint(_in("fuel", FUELS), name="fuel"),
        CheckConstraint("cylinders BETWEEN 1 AND 24", name="cylinders"),
        CheckConstraint(_in("spread_rule", SPREAD_RULES), name="spread_rule"),
        CheckConstraint("min_ratio > 0 AND min_ratio <= 1", name="min_ratio"),
        CheckConstraint("compression_ratio > 1", name="compression_ratio"),
    )
    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(sa_column=Column(String(80), unique=True, nullable=False))
    fuel: str = Field(sa_column=Column(String(16), nullable=False))
    cylinders: int
    banks: str = Field(sa_column=Column(String(120), nullable=False))
    compression_ratio: float
    min_compression_kpa: float
    min_compression_typed: str = Field(sa_column=Column(String(32), nullable=False))
    min_compression_unit: str = Field(sa_column=Column(String(8), nullable=False))
    expected_kpa: float | None = None
    spread_rule: str = Field(default="ratio", sa_column=Column(String(16), nullable=False))
    min_ratio: float = 0.75
    max_diff_kpa: float | None = None
    min_crank_rpm: float | None = None
    warm_test: bool = True
    system_volts: int = 12
    test_interval_days: int = 365
    # The limit columns above are the family's current limits: version ``limits_version``
    # of its :class:`FamilyLimits` history (written together, in one transaction).
    limits_version: int = Field(
        default=1, sa_column=Column(Integer(), nullable=False, server_default=text("1")))
    created_at: datetime = Field(default_factory=_utcnow)


class FamilyLimits(SQLModel, table=True):
    """One version of an engine family's limits: what, who, when, why.

    Never changed or deleted: a change adds the next version, and the family's own limit
    columns take its values. Health snapshots and verdicts name the version they used.
    """

    __tablename__ = "family_limits"
    __table_args__ = (
        UniqueConstraint("family_id", "version", name="uq_family_limits_family_version"),
        CheckConstraint("version >= 1", name="version"),
        CheckConstraint(_in("spread_rule", SPREAD_RULES), name="spread_rule"),
        CheckConstraint("min_ratio > 0 AND min_ratio <= 1", name="min_ratio"),
        CheckConstraint(_in("source", LIMIT_SOURCES), name="source"),
    )
    id: int | None = Field(default=None, primary_key=True)
    # No index of its own: the unique (family_id, version) index serves family look-ups.
    family_id: int = Field(foreign_key="engine_family.id")
    version: int
    min_compression_kpa: float
    min_compression_typed: str = Field(sa_column=Column(String(32), nullable=False))
    min_compression_unit: str = Field(sa_column=Column(String(8), nullable=False))
    expected_kpa: float | None = None
    spread_rule: str = Field(sa_column=Column(String(16), nullable=False))
    min_ratio: float
    max_diff_kpa: float | None = None
    min_crank_rpm: float | None = None
    warm_test: bool
    test_interval_days: int
    reason: str = Field(sa_column=Column(String(500), nullable=False))
    source: str = Field(sa_column=Column(String(16), nullable=False))
    batch_id: int | None = Field(default=None, foreign_key="import_batch.id")
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(sa_column=Column(String(80), nullable=False))


class Unit(SQLModel, table=True):
    """One vehicle or machine, known by its fleet number."""

    __tablename__ = "unit"
    id: int | None = Field(default=None, primary_key=True)
    fleet_no: str = Field(sa_column=Column(String(40), unique=True, nullable=False))
    site_id: int = Field(foreign_key="site.id", index=True)
    family_id: int = Field(foreign_key="engine_family.id", index=True)
    in_service: date | None = None
    hours_per_week: float | None = None
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(default="", sa_column=Column(String(80), nullable=False))


class ImportBatch(SQLModel, table=True):
    """One imported file: what it held and how the import ended."""

    __tablename__ = "import_batch"
    id: int | None = Field(default=None, primary_key=True)
    file_name: str = Field(sa_column=Column(String(255), nullable=False))
    content_sha256: str = Field(sa_column=Column(String(64), unique=True, nullable=False))
    file_kind: str = Field(sa_column=Column(String(16), nullable=False))
    rows_read: int = 0
    rows_written: int = 0
    rows_present: int = 0
    outcome: str = Field(sa_column=Column(String(16), nullable=False))
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(default="", sa_column=Column(String(80), nullable=False))


class Test(SQLModel, table=True):
    """One session at the engine: when, hour meter, and the conditions of the test."""

    __tablename__ = "test"
    __table_args__ = (
        UniqueConstraint("unit_id", "tested_at", "hours", name="uq_test_unit_time_hours"),
        CheckConstraint("hours >= 0", name="hours"),
        CheckConstraint(_in("source", SOURCES), name="source"),
    )
    __test__ = False  # not a pytest class
    id: int | None = Field(default=None, primary_key=True)
    unit_id: int = Field(foreign_key="unit.id")
    tested_at: datetime = Field(sa_column=Column(DateTime(), nullable=False))  # shop local time
    hours: float
    battery_v: float | None = None
    crank_rpm: float | None = None
    engine_temp_c: float | None = None
    baro_kpa: float | None = None
    throttle_open: bool | None = None
    technician: str | None = Field(default=None, sa_column=Column(String(80)))
    note: str | None = Field(default=None, sa_column=Column(String(2000)))
    source: str = Field(sa_column=Column(String(16), nullable=False))
    batch_id: int | None = Field(default=None, foreign_key="import_batch.id", index=True)
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(default="", sa_column=Column(String(80), nullable=False))


class Reading(SQLModel, table=True):
    """One measured value of a test, in SI beside the value and unit as typed."""

    __tablename__ = "reading"
    __table_args__ = (
        CheckConstraint(_in("kind", READING_KINDS), name="kind"),
        CheckConstraint(
            f"(cylinder IS NULL AND {_in('kind', VACUUM_KINDS)}) OR "
            f"(cylinder >= 1 AND {_in('kind', CYLINDER_KINDS)})",
            name="cylinder",
        ),
        UniqueConstraint("test_id", "kind", "cylinder", name="uq_reading_test_kind_cylinder"),
    )
    id: int | None = Field(default=None, primary_key=True)
    # No index of its own: the unique (test_id, kind, cylinder) index serves test_id look-ups.
    test_id: int = Field(foreign_key="test.id")
    kind: str = Field(sa_column=Column(String(20), nullable=False))
    cylinder: int | None = None
    value_si: float
    typed_value: str = Field(sa_column=Column(String(32), nullable=False))
    typed_unit: str = Field(sa_column=Column(String(8), nullable=False))


class ServiceEvent(SQLModel, table=True):
    """Work on the engine that changes its condition (overhaul, head, valves...)."""

    __tablename__ = "service_event"
    __table_args__ = (
        CheckConstraint(_in("kind", EVENT_KINDS), name="kind"),
        UniqueConstraint("unit_id", "date", "kind", "cylinders", name="uq_service_event_key"),
    )
    id: int | None = Field(default=None, primary_key=True)
    unit_id: int = Field(foreign_key="unit.id", index=True)
    date: date
    hours: float | None = None
    kind: str = Field(sa_column=Column(String(20), nullable=False))
    cylinders: str = Field(default="", sa_column=Column(String(80), nullable=False))
    note: str | None = Field(default=None, sa_column=Column(String(2000)))
    batch_id: int | None = Field(default=None, foreign_key="import_batch.id")
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(default="", sa_column=Column(String(80), nullable=False))


class TestVoid(SQLModel, table=True):
    """A test taken out of the analysis, with why, by whom and when. The test stays."""

    __tablename__ = "test_void"
    __test__ = False
    id: int | None = Field(default=None, primary_key=True)
    test_id: int = Field(foreign_key="test.id", unique=True)
    reason: str = Field(sa_column=Column(String(500), nullable=False))
    voided_by: str = Field(sa_column=Column(String(80), nullable=False))
    voided_at: datetime = Field(default_factory=_utcnow)


LEVELS = ("act", "plan", "retest", "watch", "sound")


class HealthSnapshot(SQLModel, table=True):
    """A unit's health level and reasons for one week, so the board can say what changed."""

    __tablename__ = "health_snapshot"
    __table_args__ = (
        UniqueConstraint("unit_id", "week_start", name="uq_health_snapshot_unit_week"),
        CheckConstraint(_in("level", LEVELS), name="level"),
        Index("ix_health_snapshot_week_level", "week_start", "level"),
    )
    id: int | None = Field(default=None, primary_key=True)
    unit_id: int = Field(foreign_key="unit.id")
    week_start: date
    as_of: date
    level: str = Field(sa_column=Column(String(8), nullable=False))
    main_code: str | None = Field(default=None, sa_column=Column(String(40)))
    main_text: str | None = Field(default=None, sa_column=Column(String(500)))
    reasons_json: str = Field(default="[]", sa_column=Column(Text(), nullable=False))
    last_test_id: int | None = Field(default=None, foreign_key="test.id")
    last_tested_at: datetime | None = Field(default=None, sa_column=Column(DateTime()))
    last_hours: float | None = None
    projected_hours: float | None = None
    projected_hours_early: float | None = None
    projected_date: date | None = None
    projected_date_early: date | None = None
    wear_kpa_per_1000h: float | None = None
    limits_version: int | None = None  # the family's limits version the level was judged by
    computed_at: datetime = Field(default_factory=_utcnow)


class FamilyWear(SQLModel, table=True):
    """A family's pooled wear statistics from the last full refresh (for one-unit refreshes)."""

    __tablename__ = "family_wear"
    __table_args__ = (
        UniqueConstraint("family_id", "week_start", name="uq_family_wear_family_week"),
    )
    id: int | None = Field(default=None, primary_key=True)
    family_id: int = Field(foreign_key="engine_family.id")
    week_start: date
    mean_slope: float | None = None  # kPa per hour, sea-level equivalent
    mean_slope_se: float | None = None
    tau2: float | None = None  # between-series variance of slopes
    pooled_sd: float | None = None  # test noise, kPa
    pooled_df: float | None = None
    spread_mean_slope: float | None = None  # the same for the lowest/highest ratio
    spread_mean_slope_se: float | None = None
    spread_tau2: float | None = None
    spread_pooled_sd: float | None = None
    spread_pooled_df: float | None = None
    n_series: int = 0
    computed_at: datetime = Field(default_factory=_utcnow)


PLAN_STATUSES = ("new", "booked", "rebooked")


class OverhaulPlan(SQLModel, table=True):
    """A committed overhaul plan: who, when, as of which day, with which shop settings.

    Never deleted: a newer plan supersedes it (the latest ``id`` at or before a day wins).
    """

    __tablename__ = "overhaul_plan"
    id: int | None = Field(default=None, primary_key=True)
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(sa_column=Column(String(80), nullable=False))
    as_of: date = Field(index=True)
    week_start: date
    weeks: int = 13
    settings_json: str = Field(default="{}", sa_column=Column(Text(), nullable=False))
    l_max: int | None = None  # weeks; None when the plan has no job
    late_count: int = 0
    job_count: int = 0


class OverhaulBooking(SQLModel, table=True):
    """One unit's overhaul week in a committed plan."""

    __tablename__ = "overhaul_booking"
    __table_args__ = (
        UniqueConstraint("plan_id", "unit_id", name="uq_overhaul_booking_plan_unit"),
        CheckConstraint(_in("status", PLAN_STATUSES), name="status"),
        CheckConstraint("priority >= 0", name="priority"),
    )
    id: int | None = Field(default=None, primary_key=True)
    plan_id: int = Field(foreign_key="overhaul_plan.id", index=True)
    unit_id: int = Field(foreign_key="unit.id", index=True)
    site_id: int = Field(foreign_key="site.id")
    week_start: date  # Monday of the booked ISO week
    due_week_start: date  # Monday of the week of the conservative projected limit
    lateness_weeks: int = 0  # > 0: the overhaul comes after the projected limit
    priority: int = 0  # weeks the planner moved the effective due week earlier
    status: str = Field(sa_column=Column(String(10), nullable=False))


# The capture tables (migration 0004).
from sqlalchemy import BigInteger, LargeBinary  # noqa: E402 - kept with the tables that use them


class FiringOrder(SQLModel, table=True):
    """An engine family's firing order, as given with a capture. Never changed in place: a
    new row supersedes the older ones (the latest ``id`` of a family is in force)."""

    __tablename__ = "firing_order"
    id: int | None = Field(default=None, primary_key=True)
    family_id: int = Field(foreign_key="engine_family.id", index=True)
    firing_order: str = Field(sa_column=Column(String(120), nullable=False))  # "1-3-4-2"
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(sa_column=Column(String(80), nullable=False))


class Capture(SQLModel, table=True):
    """A recorded cranking or idle capture kept with the test whose readings it gave.

    The samples are in :class:`CaptureBlock` rows (a compressed numpy archive split in
    blocks); ``channel_map_json`` says which column is what, in which unit and scale, and
    ``derived_json`` what was derived from it.
    """

    __tablename__ = "capture"
    id: int | None = Field(default=None, primary_key=True)
    test_id: int = Field(foreign_key="test.id", index=True)
    file_name: str = Field(sa_column=Column(String(255), nullable=False))
    content_sha256: str = Field(sa_column=Column(String(64), unique=True, nullable=False))
    file_bytes: int = Field(sa_column=Column(BigInteger(), nullable=False))
    samples: int
    sample_rate_hz: float
    start_s: float
    duration_s: float
    time_column: str = Field(sa_column=Column(String(120), nullable=False))
    time_unit: str = Field(sa_column=Column(String(4), nullable=False))
    channel_map_json: str = Field(sa_column=Column(Text(), nullable=False))
    derived_json: str = Field(sa_column=Column(Text(), nullable=False))
    data_format: str = Field(sa_column=Column(String(32), nullable=False))
    data_bytes: int = Field(sa_column=Column(BigInteger(), nullable=False))
    created_at: datetime = Field(default_factory=_utcnow)
    created_by: str = Field(sa_column=Column(String(80), nullable=False))


class CaptureBlock(SQLModel, table=True):
    """One block of a capture's compressed samples, in order of ``seq``."""

    __tablename__ = "capture_block"
    __table_args__ = (UniqueConstraint("capture_id", "seq", name="uq_capture_block_seq"),)
    id: int | None = Field(default=None, primary_key=True)
    capture_id: int = Field(foreign_key="capture.id", index=True)
    seq: int
    data: bytes = Field(sa_column=Column(LargeBinary(), nullable=False))


# Users, sessions and the audit trail (migration 0007).
ROLES = ("technician", "planner", "manager", "admin")  # fleetdb.access.ROLES, the same order


class AppUser(SQLModel, table=True):
    """A person who logs in to the dashboard, with one role. Never deleted: disabled."""

    __tablename__ = "app_user"
    __table_args__ = (CheckConstraint(_in("role", ROLES), name="role"),)
    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(sa_column=Column(String(80), unique=True, nullable=False))
    role: str = Field(sa_column=Column(String(16), nullable=False))
    # "scrypt$n=...,r=...,p=...$salt$key": the parameters travel with the hash.
    password_hash: str = Field(sa_column=Column(String(255), nullable=False))
    enabled: bool = True
    created_at: datetime = Field(default_factory=_utcnow)
    changed_at: datetime = Field(default_factory=_utcnow)


class UserSession(SQLModel, table=True):
    """One dashboard login; the browser holds a random token, the store its SHA-256."""

    __tablename__ = "user_session"
    id: int | None = Field(default=None, primary_key=True)
    token_sha256: str = Field(sa_column=Column(String(64), unique=True, nullable=False))
    user_id: int = Field(foreign_key="app_user.id", index=True)
    remote: str = Field(default="", sa_column=Column(String(64), nullable=False))
    created_at: datetime = Field(default_factory=_utcnow)
    last_seen_at: datetime = Field(default_factory=_utcnow)
    ended_at: datetime | None = None


class AuditEvent(SQLModel, table=True):
    """One write: when, who, from where, what. Append-only."""

    __tablename__ = "audit_event"
    id: int | None = Field(default=None, primary_key=True)
    at: datetime = Field(default_factory=_utcnow)
    user_name: str = Field(sa_column=Column(String(80), nullable=False))
    origin: str = Field(sa_column=Column(String(200), nullable=False))
    action: str = Field(sa_column=Column(String(40), nullable=False))
    summary: str = Field(sa_column=Column(String(500), nullable=False))
    detail_json: str = Field(default="{}", sa_column=Column(Text(), nullable=False))
    family_id: int | None = Field(default=None, foreign_key="engine_family.id", index=True)


class AuditUnit(SQLModel, table=True):
    """Which units a write touched (the index serves a unit's trail)."""

    __tablename__ = "audit_unit"
    __table_args__ = (UniqueConstraint("unit_id", "event_id", name="uq_audit_unit_unit_event"),)
    id: int | None = Field(default=None, primary_key=True)
    event_id: int = Field(foreign_key="audit_event.id", index=True)
    unit_id: int = Field(foreign_key="unit.id")
