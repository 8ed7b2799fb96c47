"""Plain-text helpers shared by the product's commands and the demo tools.

An aligned table for a terminal, a text stream of a (possibly gzip-compressed) CSV file, and
the chunking of a counts CSV into header-carrying bodies that
:func:`service.pipeline.ingest.parse_csv_batch` reads — the one count-CSV reader.
"""

from __future__ import annotations

import gzip
import io
import sys
from collections.abc import Iterator, Sequence
from typing import Any, TextIO

from service.errors import TallywardError

GZIP_MAGIC = b"\x1f\x8b"


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str], *, out: TextIO | None = None) -> None:
    """Print a plain aligned table (numbers right-aligned, text left-aligned)."""
    out = out or sys.stdout
    cells = [[str(h) for h in headers]] + [["" if v is None else str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]

    def line(r: Sequence[str]) -> str:
        return "  ".join(v.rjust(w) if _numeric(v) else v.ljust(w)
                         for v, w in zip(r, widths, strict=True)).rstrip()

    print(line(cells[0]), file=out)
    print("  ".join("-" * w for w in widths), file=out)
    for r in cells[1:]:
        print(line(r), file=out)


def _numeric(v: str) -> bool:
    return v.replace(".", "", 1).replace("-", "", 1).replace(",", "").replace("%", "").isdigit()


def open_text(path: str) -> TextIO:
    """A text stream of a CSV file, gzip-compressed or not (decided by its first bytes)."""
    raw = open(path, "rb")  # noqa: SIM115 - returned to the caller
    magic = raw.read(2)
    raw.seek(0)
    if magic == GZIP_MAGIC:
        return io.TextIOWrapper(gzip.GzipFile(fileobj=raw), encoding="utf-8-sig", newline="")
    return io.TextIOWrapper(raw, encoding="utf-8-sig", newline="")


def csv_chunks(stream: TextIO, *, chunk: int) -> Iterator[tuple[int, bytes]]:
    """(first data line number, CSV bytes with header) chunks of a counts CSV.

    Each chunk holds the file's header line and at most ``chunk`` data lines, so it can be
    parsed on its own; the file's line number of a chunk's line ``k`` (header = line 1) is
    ``first - 2 + k``.
    """
    header = stream.readline()
    if not header:
        raise TallywardError("the file is empty; expected the header detector_id,start,count")
    lines: list[str] = []
    line_no = 2
    first = line_no
    for line in stream:
        lines.append(line)
        line_no += 1
        if len(lines) >= chunk:
            yield first, (header + "".join(lines)).encode()
            lines = []
            first = line_no
    if lines:
        yield first, (header + "".join(lines)).encode()


def file_pos(stream: Any) -> int:
    """Bytes of the underlying file read so far (compressed bytes for a gzip file)."""
    fileobj = getattr(stream.buffer, "fileobj", None)
    try:
        if fileobj is not None:
            return fileobj.tell()
        return stream.buffer.tell()
    except (OSError, ValueError):
        return 0
