"""Plain-text tables for the console: aligned columns, numbers right, words left."""

from __future__ import annotations

from collections.abc import Sequence


def format_table(headers: Sequence[str], rows: Sequence[Sequence[object]], indent: int = 2) -> str:
    """Format rows under headers; a column whose cells are all numbers is right-aligned.

    Examples
    --------
    >>> print(format_table(["model", "AICc"], [["vant-hoff", "-81.2"], ["apelblat", "-80.1"]]))
      model      AICc
      vant-hoff  -81.2
      apelblat   -80.1
    """
    cells = [[str(c) for c in row] for row in rows]
    widths = [
        max(len(h), *(len(r[i]) for r in cells)) if cells else len(h) for i, h in enumerate(headers)
    ]

    def numeric(text: str) -> bool:
        try:
            float(text.replace("±", "").split()[0])
        except (ValueError, IndexError):
            return False
        return True

    right = [bool(cells) and all(numeric(r[i]) for r in cells) for i in range(len(headers))]

    def line(values: Sequence[str]) -> str:
        parts = [
            v.rjust(w) if r else v.ljust(w) for v, w, r in zip(values, widths, right, strict=True)
        ]
        return (" " * indent + "  ".join(parts)).rstrip()

    return "\n".join([line(list(headers)), *(line(r) for r in cells)])
