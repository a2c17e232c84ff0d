"""How ``tidegate`` prints tables and times: a header row, columns padded to their widest cell,
and times in the one format of ``tidegate why`` and the pages (``2026-12-01 02:45 UTC``)."""

from __future__ import annotations

from collections.abc import Sequence

from service.explain import moment

__all__ = ["format_table", "moment", "print_table"]


def format_table(headers: Sequence[str], rows: Sequence[Sequence[object]]) -> list[str]:
    """Lines of a table: *headers* in capitals, then *rows*; the last column is not padded
    (it holds free text such as a reason)."""
    cells = [[str(h).upper() for h in headers]] + [
        ["-" if c is None or c == "" else str(c) for c in row] for row in rows
    ]
    widths = [max(len(row[i]) for row in cells) for i in range(len(headers))]
    lines = []
    for row in cells:
        padded = [cell.ljust(widths[i]) for i, cell in enumerate(row[:-1])] + [row[-1]]
        lines.append("  ".join(padded).rstrip())
    return lines


def print_table(headers: Sequence[str], rows: Sequence[Sequence[object]]) -> None:
    """Print :func:`format_table`'s lines."""
    for line in format_table(headers, rows):
        print(line)
