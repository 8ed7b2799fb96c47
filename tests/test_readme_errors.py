"""The README's table of error codes lists every code the service can answer with."""

from __future__ import annotations

import re
from pathlib import Path

import service
from service import errors

ROOT = Path(__file__).resolve().parents[1]


def _codes_in_source() -> set[str]:
    codes = {cls.code for cls in vars(errors).values()
             if isinstance(cls, type) and issubclass(cls, errors.TallywardError)}
    for path in Path(service.__file__).parent.rglob("*.py"):
        text = path.read_text()
        codes |= set(re.findall(r'code="([a-z_]+)"', text))
        codes |= set(re.findall(r'\{"error": "([a-z_]+)"', text))
        codes |= set(re.findall(r'(?:404|405): "([a-z_]+)"', text))
    return codes


def test_every_error_code_is_in_the_readme_table() -> None:
    """A code the service answers with but the README does not explain is a test failure."""
    table = (ROOT / "README.md").read_text().split("### Errors", 1)[1].split("\n### ", 1)[0]
    documented = set(re.findall(r"^\| \d{3} \| `([a-z_]+)` \|", table, flags=re.M))
    found = _codes_in_source()
    assert {"no_baseline", "interval_locked", "not_found", "forbidden"} <= found
    assert found - documented == set()
