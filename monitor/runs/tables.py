"""Plain text tables for the terminal: columns as wide as their widest cell.

One helper for every table the command line prints (``replay``, ``fleet``), so a long
vessel id or time stamp widens its column instead of pushing the ones after it.
"""

from __future__ import annotations

from collections.abc import Sequence


def text_table(headers: Sequence[str], rows: Sequence[Sequence[str]], right: str = "") -> list[str]:
    """Return the lines of a table: header, a rule, then one line per row.

    ``right`` holds one character per column, ``">"`` for right-aligned (numbers) and
    anything else for left-aligned; missing characters mean left. The last column is
    never padded (it holds free text such as flags). Cells are strings already.
    """
    widths = [len(h) for h in headers]
    for row in rows:
        for i, cell in enumerate(row[: len(widths)]):
            widths[i] = max(widths[i], len(cell))

    def line(cells: Sequence[str]) -> str:
        parts = []
        for i, cell in enumerate(cells):
            if i == len(cells) - 1:
                parts.append(cell)
            elif i < len(right) and right[i] == ">":
                parts.append(cell.rjust(widths[i]))
            else:
                parts.append(cell.ljust(widths[i]))
        return "  ".join(parts).rstrip()

    head = line(list(headers))
    return [head, "-" * len(head), *(line(list(r)) for r in rows)]
