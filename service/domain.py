"""The trade's facts, stated once. Schemas, table constraints, statistics and routes import
them from here, so a rule cannot drift between the edge, the database and the fit.

- **Intervals**: a detector reports one count per ``interval_s`` seconds, on a grid aligned to
  the local clock. What can be fitted and scored is one rule, :func:`interval_ok`.
- **Detector ids**: :data:`DETECTOR_ID_PATTERN` (:data:`DETECTOR_ID_RULE` in words).
- **Road classes** and their base capacities, **day types**, **alert kinds** and **causes**,
  **roles** and what each may do.
- **Bounds** of what the database holds, checked at the edge so that bad input is a clear 422
  and never a database error (a 500):

  - Integer ids and cursors: ``INTEGER`` columns hold up to 2**31 - 1 on PostgreSQL,
    ``BIGINT`` (alert ``seq``) up to 2**63 - 1; SQLite holds 2**63 - 1 in both.
  - Text: PostgreSQL cannot store NUL at all, and other control characters in ids, filters,
    names and labels are client bugs; free-text notes may hold tabs and line breaks.

This module imports nothing from the service: every layer may import it.
"""

from __future__ import annotations

import re

# ---------------------------------------------------------------------------- intervals

SECONDS_PER_HOUR = 3600
# Short intervals: freeway controllers report every 20 or 30 s. A lane then sees a few vehicles
# per interval (often none at night), too few for single-interval tests, so such detectors are
# fitted and scored on their counts summed to SHORT_INTERVAL_WINDOW_S windows (see
# scoring_interval_s): the statistics then judge windows with enough expected vehicles.
SHORT_INTERVALS_S: tuple[int, ...] = (20, 30)  # seconds; each divides SHORT_INTERVAL_WINDOW_S
SHORT_INTERVAL_WINDOW_S = 300  # seconds: the window short intervals are summed to
MIN_INTERVAL_S = SHORT_INTERVALS_S[0]  # seconds: the shortest interval a detector may report
MIN_WINDOW_INTERVAL_S = 60  # seconds: from here up, intervals are fitted and scored as reported
MAX_INTERVAL_S = 3600  # seconds
# Why "divides an hour": the baseline bins the local day into interval-long bins and keeps its
# UTC phase across DST changes (which move the clock by whole hours almost everywhere), and the scoring thresholds
# count intervals per week. A divisor of 3,600 s satisfies both; 1,440 s (which divides a day
# but not an hour) does not, so it is refused at registration instead of failing every fit.
ALLOWED_INTERVALS_S: tuple[int, ...] = SHORT_INTERVALS_S + tuple(
    s for s in range(MIN_WINDOW_INTERVAL_S, MAX_INTERVAL_S + 1) if SECONDS_PER_HOUR % s == 0)
INTERVAL_RULE_TEXT = (
    "20 or 30 seconds (fitted and scored on 5-minute sums), or "
    f"{MIN_WINDOW_INTERVAL_S}..{MAX_INTERVAL_S} seconds and divide one hour (3600 s) exactly: "
    + ", ".join(str(s) for s in ALLOWED_INTERVALS_S))
# The same rule as SQL, for the detectors table's CHECK constraint (SQLite and PostgreSQL).
INTERVAL_CHECK_SQL = (f"(interval_s >= {MIN_WINDOW_INTERVAL_S} AND interval_s <= {MAX_INTERVAL_S} "
                      f"AND {SECONDS_PER_HOUR} % interval_s = 0) OR interval_s IN "
                      f"({', '.join(str(s) for s in SHORT_INTERVALS_S)})")


def interval_ok(interval_s: object) -> bool:
    """True when ``interval_s`` (seconds) is an interval length that can be fitted and scored:
    20 or 30, or an integer from 60 to 3600 that divides 3600."""
    return (isinstance(interval_s, int) and not isinstance(interval_s, bool)
            and (interval_s in SHORT_INTERVALS_S
                 or (MIN_WINDOW_INTERVAL_S <= interval_s <= MAX_INTERVAL_S
                     and SECONDS_PER_HOUR % interval_s == 0)))


def scoring_interval_s(interval_s: int) -> int:
    """The interval (seconds) a detector reporting every ``interval_s`` is fitted and scored on:
    its own from 60 s up, SHORT_INTERVAL_WINDOW_S for the short intervals (their counts summed
    per window; a window counts as reported only when all its intervals arrived)."""
    return SHORT_INTERVAL_WINDOW_S if interval_s < MIN_WINDOW_INTERVAL_S else interval_s


def interval_error(interval_s: object) -> str | None:
    """What is wrong with an interval length (named ``interval_s``), or None when it is allowed."""
    if interval_ok(interval_s):
        return None
    return f"interval_s {interval_s!r} is not allowed; interval_s must be {INTERVAL_RULE_TEXT}"


# ---------------------------------------------------------------------------- detector ids

DETECTOR_ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._:\-]{0,63}$"
DETECTOR_ID_RULE = ("1 to 64 characters, each a letter, a digit, a period (.), an underscore (_), "
                    "a colon (:) or a hyphen (-); the first a letter or digit")
_ID = re.compile(DETECTOR_ID_PATTERN)

# ---------------------------------------------------------------------------- roads, days

ROAD_CLASSES = ("freeway", "arterial", "local")
# Highway Capacity Manual base capacities (from memory): basic freeway segment 2,400 pc/h/ln
# (HCM 2000 table, free-flow speed >= 70 mph; HCM 6th ed. c = 2,200 + 10 (FFS - 50) capped at
# 2,400); base saturation flow at a signalized approach 1,900 pc/h/ln. Local roads take the
# signalized figure (their flow is governed by intersections). Vehicles per hour per lane.
BASE_CAPACITY_PER_LANE_H = {"freeway": 2400.0, "arterial": 1900.0, "local": 1900.0}
# Day types of the baseline; their position is the day-type code used in arrays.
DAY_TYPES = ("weekday", "saturday", "sunday_holiday")

# ---------------------------------------------------------------------------- alerts

KINDS = ("zero_counts", "low_volume", "high_volume", "over_capacity", "repeated_value", "no_reports")
# Likely causes of an episode: ``traffic`` (neighbors deviate too), ``detector`` (they look
# normal), ``communications`` (missing or frozen data), ``unknown`` (no neighbors).
CAUSES = ("detector", "traffic", "communications", "unknown")
ALERT_STATUSES = ("open", "closed")

# ---------------------------------------------------------------------------- roles

# Roles and what they may do:
#   ingest   POST /v1/counts only (field controllers)
#   read     every GET (dashboards)
#   operate  read, plus acknowledging alerts
#   admin    everything: detectors, keys, baseline fits, ingest
GRANTS: dict[str, frozenset[str]] = {
    "ingest": frozenset({"ingest"}),
    "read": frozenset({"read"}),
    "operate": frozenset({"read", "operate"}),
    "admin": frozenset({"read", "operate", "admin", "ingest"}),
}
ROLES = tuple(GRANTS)
# What each permission lets a key do, in the words of an error message.
PERMISSION_ACTIONS: dict[str, str] = {
    "ingest": "send counts",
    "read": "read detectors, counts, baselines and alerts",
    "operate": "acknowledge alerts and set detectors in or out of service",
    "admin": "register detectors and fit baselines",
}


def roles_granting(permission: str) -> tuple[str, ...]:
    """The roles whose keys hold ``permission``."""
    return tuple(role for role, held in GRANTS.items() if permission in held)


def sql_in(column: str, values: tuple[str, ...]) -> str:
    """``column IN ('a', 'b')`` for a CHECK constraint over one of the tuples above."""
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


# ---------------------------------------------------------------------------- bounds, text

INT32_MAX = 2**31 - 1
INT64_MAX = 2**63 - 1

# C0/C1 controls and DEL, lone surrogates, line/paragraph separators: never in ids or registry
# text (PostgreSQL refuses NUL, and a log line or a CSV export would break on the others).
CONTROL_CHARACTERS = re.compile(r"[\x00-\x1f\x7f-\x9f\ud800-\udfff\u2028\u2029]")
_CONTROL_IN_PROSE = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")


def plain_text(value: str | None) -> str | None:
    """``value`` unchanged; ``ValueError`` if it holds a control character (C0, DEL or C1)."""
    if value is not None and (found := CONTROL_CHARACTERS.search(value)):
        raise ValueError(f"holds the control character U+{ord(found.group()):04X} at position "
                         f"{found.start()}; ids, names, filters and labels may not contain NUL, "
                         "tabs, line breaks or other control characters")
    return value


def prose(value: str | None) -> str | None:
    """``value`` unchanged; ``ValueError`` if it holds a control character other than tab,
    line feed or carriage return."""
    if value is not None and (found := _CONTROL_IN_PROSE.search(value)):
        raise ValueError(f"holds the control character U+{ord(found.group()):04X} at position "
                         f"{found.start()}; text may contain tabs and line breaks but not NUL or "
                         "other control characters")
    return value


def control_character_error(text: str) -> str | None:
    """A message naming the first control character of ``text``, or None when it has none."""
    bad = CONTROL_CHARACTERS.search(text)
    if bad is None:
        return None
    return (f"holds the control character U+{ord(bad.group()):04X} at position {bad.start() + 1}; "
            "text fields take printable characters only (no NUL, tab or line break)")


def detector_id_error(detector_id: str) -> str | None:
    """What is wrong with a detector id (named ``detector_id`` in the message), or None."""
    if _ID.fullmatch(detector_id):  # fullmatch: "$" alone would let a trailing newline through
        return None
    bad = CONTROL_CHARACTERS.search(detector_id)
    if bad is not None:
        return (f"detector_id holds the control character U+{ord(bad.group()):04X} at position "
                f"{bad.start() + 1}; ids are {DETECTOR_ID_RULE}")
    if len(detector_id) > 64:
        return f"detector_id is {len(detector_id):,} characters long; ids are {DETECTOR_ID_RULE}"
    shown = repr(detector_id[:64])
    return f"detector_id {shown} is not a valid id; ids are {DETECTOR_ID_RULE}"

# ---------------------------------------------------------------------------- service states

# A detector's service state, set by people (PATCH /v1/detectors/{id}):
#   in_service      expected to report; alerts raised as usual (the default)
#   out_of_service  being repaired or known bad: counts are stored and scored, but alerts it
#                   would raise are kept as suppressed (shown only when asked for); returns to
#                   service by itself at its ``until`` time, when one is set
#   retired         no longer expected to report: no missing-data alerts; kept for history
SERVICE_STATES = ("in_service", "out_of_service", "retired")
# Who may set which state: operate keys mute and unmute; only admin keys retire (or bring a
# retired detector back), as retiring changes what the network is expected to report.
SERVICE_STATE_PERMISSION = {"in_service": "operate", "out_of_service": "operate",
                            "retired": "admin"}

# Entries of an alert's append-only history.
HISTORY_ACTIONS = ("acknowledge", "unacknowledge", "note")
