"""The README's settings table names every setting with the default the code has."""

from __future__ import annotations

import re
from pathlib import Path

from service.config import Settings

README = Path(__file__).resolve().parent.parent / "README.md"


def _shown(default: object) -> str:
    if default is None:
        return "unset"
    if isinstance(default, bool):
        return f"`{str(default).lower()}`"
    if isinstance(default, float) and default.is_integer():
        return f"`{int(default)}`"
    return f"`{default}`"


def test_every_setting_is_in_the_readme_with_its_default() -> None:
    """Each field of ``Settings`` has a row ``TALLYWARD_<NAME>`` whose default column is the
    field's default, and the table names no setting the code lacks."""
    rows = dict(re.findall(r"^\| `TALLYWARD_([A-Z0-9_]+)` \| ([^|]+?) \|", README.read_text(),
                           re.M))
    fields = {name.upper(): field.default for name, field in Settings.model_fields.items()}
    assert {n: _shown(d) for n, d in fields.items()} == {n: rows.get(n) for n in fields}
    assert set(rows) <= set(fields), set(rows) - set(fields)
