"""Every component id of the dashboard, page-prefixed, and the pattern-id builders.

Pattern-matching ids match only when their key sets are identical, so they are built
here and nowhere else, always with the keys ``type`` and ``index``.
"""

from __future__ import annotations

from typing import Any

# -- the app shell ----------------------------------------------------------------------
NAV = "app-nav"
APP_URL = "app-url"
APP_USER = "app-user"
APP_LOGOUT = "app-logout"

# -- Audit trail (/trail) -------------------------------------------------------------
TRAIL_PICK = "trail-pick"
TRAIL_TABLE = "trail-table"
TRAIL_EXPORT = "trail-export"
TRAIL_DOWNLOAD = "trail-download"
TRAIL_VOID_SECTION = "trail-void-section"
TRAIL_VOID_TEST = "trail-void-test"
TRAIL_VOID_REASON = "trail-void-reason"
TRAIL_VOID = "trail-void"
TRAIL_VOID_RESULT = "trail-void-result"
UNIT_TRAIL_LINK = "unit-trail-link"

# -- Log a test (/log) ----------------------------------------------------------------
LOG_UNIT = "log-unit"
LOG_UNIT_SUMMARY = "log-unit-summary"
LOG_KIND = "log-kind"
LOG_PRESSURE_UNIT = "log-pressure-unit"
LOG_BLOCK = "log-block"
LOG_BLOCK_CAPTION = "log-block-caption"
LOG_TESTED_AT = "log-tested-at"
LOG_HOURS = "log-hours"
LOG_BATTERY_V = "log-battery-v"
LOG_CRANK_RPM = "log-crank-rpm"
LOG_ENGINE_TEMP_C = "log-engine-temp-c"
LOG_BARO_KPA = "log-baro-kpa"
LOG_THROTTLE = "log-throttle"
LOG_VACUUM_CRANKING = "log-vacuum-cranking"
LOG_VACUUM_IDLE = "log-vacuum-idle"
LOG_VACUUM_UNIT = "log-vacuum-unit"
LOG_TECHNICIAN = "log-technician"
LOG_NOTE = "log-note"
LOG_CHECK = "log-check"
LOG_SAVE = "log-save"
LOG_SAVE_RESULT = "log-save-result"
LOG_VERDICT = "log-verdict"
LOG_VERDICT_PANEL = "log-verdict-panel"
LOG_VERDICT_GRAPH = "log-verdict-graph"
LOG_SAFETY = "log-safety"

# -- Health board (/) ----------------------------------------------------------------
BOARD_AS_OF = "board-as-of"
BOARD_WEEK = "board-week"
BOARD_COUNTS = "board-counts"
BOARD_SITES = "board-sites"
BOARD_SITE = "board-site"
BOARD_FAMILY = "board-family"
BOARD_LEVEL = "board-level"
BOARD_SEARCH = "board-search"
BOARD_TABLE = "board-table"
BOARD_SHOWING = "board-showing"
BOARD_EXPORT = "board-export"
BOARD_DOWNLOAD = "board-download"
BOARD_GO = "board-go"

# -- Unit history (/unit) ------------------------------------------------------------
UNIT_PICK = "unit-pick"
UNIT_AS_OF = "unit-as-of"
UNIT_PRESSURE_UNIT = "unit-pressure-unit"
UNIT_BASIS = "unit-basis"
UNIT_SUMMARY = "unit-summary"
UNIT_COMPRESSION = "unit-compression"
UNIT_SPREAD = "unit-spread"
UNIT_VACUUM = "unit-vacuum"
UNIT_TESTS = "unit-tests"

# -- Fleet wear (/fleet) -------------------------------------------------------------
FLEET_AS_OF = "fleet-as-of"
FLEET_FAMILY = "fleet-family"
FLEET_HIGHLIGHT = "fleet-highlight"
FLEET_PRESSURE_UNIT = "fleet-pressure-unit"
FLEET_WEAR = "fleet-wear"
FLEET_HOURS = "fleet-hours"
FLEET_SITES = "fleet-sites"
FLEET_NOTE = "fleet-note"

_LOG_CYLINDER_TYPE = "log-cylinder"


def log_cylinder(index: Any) -> dict[str, Any]:
    """The id of one cylinder's reading input on the Log page.

    :param index: the cylinder number, or a wildcard (``ALL``, ``MATCH``).
    """
    return {"type": _LOG_CYLINDER_TYPE, "index": index}


def is_log_cylinder(component_id: Any) -> bool:
    """Whether an id (as it comes back from the browser) is a cylinder input's."""
    return isinstance(component_id, dict) and component_id.get("type") == _LOG_CYLINDER_TYPE

# -- Overhaul plan (/plan) -------------------------------------------------------------
PLAN_AS_OF = "plan-as-of"
PLAN_STATE = "plan-state"
PLAN_MESSAGE = "plan-message"
PLAN_SUMMARY = "plan-summary"
PLAN_CHANGES = "plan-changes"
PLAN_TIMELINE = "plan-timeline"
PLAN_JOBS = "plan-jobs"
PLAN_NOTES = "plan-notes"
PLAN_SITES = "plan-sites"
PLAN_CLOSED_ALL = "plan-closed-all"
PLAN_PRIORITY = "plan-priority"
PLAN_TRY = "plan-try"
PLAN_WHO = "plan-who"
PLAN_COMMIT = "plan-commit"
PLAN_SHOWN = "plan-shown"
PLAN_CSV = "plan-csv"
PLAN_ICS = "plan-ics"
PLAN_DOWNLOAD = "plan-download"

_PLAN_CAPACITY_TYPE = "plan-capacity"
_PLAN_LEAD_TYPE = "plan-lead"
_PLAN_CLOSED_TYPE = "plan-closed"


def plan_capacity(index: Any) -> dict[str, Any]:
    """The id of one site's capacity input (overhauls per week) on the Plan page.

    :param index: the site name, or a wildcard (``ALL``, ``MATCH``).
    """
    return {"type": _PLAN_CAPACITY_TYPE, "index": index}


def plan_lead(index: Any) -> dict[str, Any]:
    """The id of one site's parts lead time input (weeks) on the Plan page.

    :param index: the site name, or a wildcard.
    """
    return {"type": _PLAN_LEAD_TYPE, "index": index}


def plan_closed(index: Any) -> dict[str, Any]:
    """The id of one site's closed weeks input (``2026-W52, 2026-W53``) on the Plan page.

    :param index: the site name, or a wildcard.
    """
    return {"type": _PLAN_CLOSED_TYPE, "index": index}

# -- Captures (Unit history and Log a test) ---------------------------------------------
UNIT_CAPTURE_PANEL = "unit-capture-panel"
UNIT_CAPTURE_PICK = "unit-capture-pick"
UNIT_CAPTURE_SUMMARY = "unit-capture-summary"
UNIT_CAPTURE_WAVEFORM = "unit-capture-waveform"
UNIT_CAPTURE_EVENTS = "unit-capture-events"
LOG_SOURCE = "log-source"
LOG_TYPED_PART = "log-typed-part"
LOG_CAPTURE_PART = "log-capture-part"
LOG_CAPTURE_UPLOAD = "log-capture-upload"
LOG_CAPTURE_FILE = "log-capture-file"
LOG_CAPTURE_KEY = "log-capture-key"
LOG_CAPTURE_MAP = "log-capture-map"
LOG_CAPTURE_FIRING = "log-capture-firing"
LOG_CAPTURE_FIRST_HUMP = "log-capture-first-hump"
LOG_CAPTURE_PREVIEW = "log-capture-preview"
LOG_CAPTURE_PREVIEW_OUT = "log-capture-preview-out"
LOG_CAPTURE_SUMMARY = "log-capture-summary"
LOG_CAPTURE_WAVEFORM = "log-capture-waveform"
LOG_CAPTURE_EVENTS = "log-capture-events"
LOG_CAPTURE_SAVE = "log-capture-save"
LOG_CAPTURE_SAVE_RESULT = "log-capture-save-result"
LOG_CAPTURE_VERDICT = "log-capture-verdict"
LOG_CAPTURE_VERDICT_PANEL = "log-capture-verdict-panel"

#: The fields of one column's row in the Log page's channel map.
CAPTURE_MAP_FIELDS = ("role", "cylinder", "unit", "slope", "offset")


def log_capture_field(name: str, index: Any) -> dict[str, Any]:
    """The id of one control of a column's row in the capture's channel map.

    :param name: one of :data:`CAPTURE_MAP_FIELDS`.
    :param index: the column's position in the header, or a wildcard (``ALL``, ``MATCH``).
    """
    assert name in CAPTURE_MAP_FIELDS
    return {"type": f"log-capture-{name}", "index": index}
LOG_READINGS_PANEL = "log-readings-panel"
LOG_VACUUM_PANEL = "log-vacuum-panel"
LOG_TYPED_ACTIONS = "log-typed-actions"
LOG_CAPTURE_ACTIONS = "log-capture-actions"
