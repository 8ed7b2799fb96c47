"""Bounds of what the database holds, checked at the edge so that bad input is a clear 422
and never a database error (a 500).

- Integer ids and cursors: ``INTEGER`` columns hold up to 2**31 - 1 on PostgreSQL,
  ``BIGINT`` (alert ``seq``) up to 2**63 - 1; SQLite holds 2**63 - 1 in both.
- Text: PostgreSQL cannot store NUL at all, and other control characters in ids, filters,
  names and labels are client bugs; free-text notes may hold tabs and line breaks.
"""

from __future__ import annotations

import re

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

