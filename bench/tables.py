"""Result tables: one structure, rendered as Markdown (RESULTS.md) or aligned text (the console)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass


@dataclass(frozen=True)
class Table:
    """A titled grid of already formatted cells; the first column is a row label."""

    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    note: str = ""  # printed under the table (method, caveats)

    def __post_init__(self) -> None:
        for row in self.rows:
            if len(row) != len(self.columns):
                raise ValueError(f"table {self.title!r}: row {row!r} has {len(row)} cells, "
                                 f"expected {len(self.columns)} ({', '.join(self.columns)})")


def make_table(title: str, columns: Sequence[str], rows: Sequence[Sequence[object]], note: str = "") -> Table:
    """A Table from any cell values (str() of each)."""
    return Table(title, tuple(columns), tuple(tuple(str(c) for c in row) for row in rows), note)


def _escape(cell: str) -> str:
    return cell.replace("|", "\\|").replace("\n", " ")


def _numeric(cell: str) -> bool:
    """Right-align cells that start like a figure (12.3 µs, 41,000/s, 2.1x, 99.5%)."""
    head = cell.lstrip("~<>≤≥+-−")
    return bool(head) and head[0].isdigit()


def render_markdown(table: Table) -> str:
    """GitHub Markdown: a bold title line, the grid, the note in italics."""
    right = [all(_numeric(r[i]) or r[i] in ("", "n/a", "—") for r in table.rows) and any(_numeric(r[i]) for r in table.rows)
             for i in range(len(table.columns))]
    lines = [f"**{table.title}**", ""]
    lines.append("| " + " | ".join(_escape(c) for c in table.columns) + " |")
    lines.append("|" + "|".join("---:" if r else "---" for r in right) + "|")
    for row in table.rows:
        lines.append("| " + " | ".join(_escape(c) for c in row) + " |")
    if table.note:
        lines += ["", f"_{table.note}_"]
    return "\n".join(lines) + "\n"


def render_text(table: Table) -> str:
    """Fixed-width text for a terminal: columns padded to their widest cell."""
    grid = [table.columns, *table.rows]
    widths = [max(len(row[i]) for row in grid) for i in range(len(table.columns))]

    def line(row: Sequence[str]) -> str:
        cells = [row[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(row[1:], widths[1:])]
        return "  ".join(cells).rstrip()

    out = [table.title, "=" * min(len(table.title), 100), line(table.columns), "  ".join("-" * w for w in widths)]
    out += [line(r) for r in table.rows]
    if table.note:
        out.append(f"({table.note})")
    return "\n".join(out) + "\n"
