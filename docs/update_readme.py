"""Regenerate the README's demo excerpts from a demo run's printed output (no hand edits).

    make demo 2>/dev/null | tee /tmp/demo.txt
    .venv/bin/python docs/update_readme.py /tmp/demo.txt

Replaces the text between ``<!-- demo-alerts:begin -->`` / ``<!-- demo-alerts:end -->`` (the
first rows of the operator's alert table, one per kind where there is one) and
``<!-- demo-detection:begin -->`` / ``<!-- demo-detection:end -->`` (the whole detection table)
in README.md. Exits 1, changing nothing, if the output lacks either table.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def _block(text: str, heading: str) -> list[str]:
    """The lines from ``heading`` to the next blank line."""
    lines = text.splitlines()
    start = next((i for i, line in enumerate(lines) if line.startswith(heading)), None)
    if start is None:
        raise SystemExit(f"the demo output has no table starting {heading!r}")
    end = next((i for i in range(start + 1, len(lines)) if not lines[i].strip()), len(lines))
    return lines[start:end]


def alert_excerpt(text: str, per_kind: int = 1) -> str:
    """The alert table's heading, header and the first alert of each kind, then an ellipsis."""
    block = _block(text, "Alerts an operator would see")
    heading, header, rows = block[0], block[1], block[2:]
    kinds = re.findall(r"\S+", header)
    column = kinds.index("kind")
    seen: dict[str, int] = {}
    kept = []
    for row in rows:
        kind = row.split()[column] if len(row.split()) > column else ""
        if seen.get(kind, 0) < per_kind:
            seen[kind] = seen.get(kind, 0) + 1
            kept.append(row)
    return "\n".join([heading, header, *kept, "..."])


def detection_table(text: str) -> str:
    lines = text.splitlines()
    start = next((i for i, line in enumerate(lines)
                  if line.startswith("Detection against the demo's injected truth")), None)
    if start is None:
        raise SystemExit("the demo output has no detection table")
    out, blank_seen = [], 0
    for line in lines[start:]:
        if not line.strip():
            blank_seen += 1
            if blank_seen == 2:
                break
        out.append(line)
    return "\n".join(out).rstrip()


def replace_between(readme: str, name: str, body: str) -> str:
    begin, end = f"<!-- {name}:begin -->", f"<!-- {name}:end -->"
    if begin not in readme or end not in readme:
        raise SystemExit(f"README.md has no {begin} ... {end} markers")
    head, rest = readme.split(begin, 1)
    _, tail = rest.split(end, 1)
    return f"{head}{begin}\n```\n{body}\n```\n{end}{tail}"


def main(argv: list[str]) -> int:
    if len(argv) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    text = Path(argv[1]).read_text()
    readme = README.read_text()
    readme = replace_between(readme, "demo-alerts", alert_excerpt(text))
    readme = replace_between(readme, "demo-detection", detection_table(text))
    README.write_text(readme)
    print(f"updated {README}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
