"""Ranking finished trials and rendering the ranking as a text table."""

from __future__ import annotations

import math
from typing import Any

COLUMNS = ("rank", "trial", "{metric}", "ami", "length_confound_index", "coverage", "n_clusters")


def ranked(rows: list[dict[str, Any]], metric: str) -> list[dict[str, Any]]:
    """Rows sorted best first by ``metric``; rows without it (or NaN) go last."""
    def sort_key(row: dict[str, Any]) -> tuple:
        value = row.get(metric)
        missing = value is None or (isinstance(value, float) and math.isnan(value))
        return (missing, -(value or 0.0) if not missing else 0.0, row.get("trial", ""))

    return [{**row, "rank": i + 1} for i, row in enumerate(sorted(rows, key=sort_key))]


COUNT_COLUMNS = frozenset({"n_clusters"})


def _cell(value: Any, column: str) -> str:
    if isinstance(value, float):
        if math.isnan(value):
            return "-"
        return f"{value:.0f}" if column in COUNT_COLUMNS else f"{value:.3f}"
    return "-" if value is None else str(value)


def table(rows: list[dict[str, Any]], metric: str, limit: int | None = None) -> str:
    """Fixed-width text table of the ranked rows."""
    columns = [c.format(metric=metric) for c in COLUMNS]
    columns = list(dict.fromkeys(columns))
    shown = rows[:limit] if limit else rows
    cells = [[_cell(row.get(c), c) for c in columns] for row in shown]
    widths = [max(len(c), *(len(r[i]) for r in cells)) if cells else len(c) for i, c in enumerate(columns)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(columns, widths))]
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(v.ljust(w) for v, w in zip(r, widths)) for r in cells]
    return "\n".join(lines)
