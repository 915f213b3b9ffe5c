"""The critical-difference diagram (Demšar 2006, section 3.2.4): average ranks on an axis, the best to the
right, each configuration's name on a leader line, and a bar joining every maximal group of configurations
that are not significantly different; the critical difference itself is drawn above the axis."""

from __future__ import annotations

import math
from typing import Mapping, Sequence

AXIS_COLOR = "#444444"
LEADER_COLOR = "#999999"
GROUP_COLOR = "#6a9fd4"
CD_COLOR = "#d0543c"
FONT_SIZE = 8
ROW_INCHES = 0.24  # vertical step between rows (labels, group bars)


def _text_inches(text: str, *, bold: bool = False) -> float:
    """Width of a label at FONT_SIZE, measured by the Agg renderer the figures are drawn with."""
    from matplotlib.backends.backend_agg import RendererAgg
    from matplotlib.font_manager import FontProperties

    dpi = 100
    width, _, _ = RendererAgg(1, 1, dpi).get_text_width_height_descent(
        text, FontProperties(size=FONT_SIZE, weight="bold" if bold else "normal"), ismath=False)
    return width / dpi


def critical_difference_figure(average_ranks: Mapping[str, float], critical_difference: float,
                               groups: Sequence[Sequence[str]], *, cd_label: str = "CD", title: str = ""):
    """A matplotlib Figure of the diagram. ``average_ranks``: configuration -> average rank (1 = best);
    ``groups``: the configurations to join by one bar each (for example ``across.non_significant_groups``).

    Artists carry gids so the structure can be checked without pixels: ``cd-axis``, ``cd-interval``,
    ``cd-group`` (one per bar), ``cd-leader`` (one per configuration) and ``cd-name`` (their labels)."""
    from harness.plots import pyplot

    if len(average_ranks) < 2:
        raise ValueError(f"The 'average_ranks' parameter must hold at least 2 configurations. Got {len(average_ranks)} instead.")
    unknown = sorted({c for g in groups for c in g} - set(average_ranks))
    if unknown:
        raise ValueError(f"The 'groups' parameter must name configurations of average_ranks. Got unknown {unknown} instead.")
    if not critical_difference > 0:
        raise ValueError(f"The 'critical_difference' parameter must be > 0. Got {critical_difference!r} instead.")

    names = sorted(average_ranks, key=lambda c: (average_ranks[c], c))
    k = len(names)
    labels = {c: f"{c} ({average_ranks[c]:.2f})" for c in names}
    # the better half is named on the right (where the best ranks are), the rest on the left
    right = names[: (k + 1) // 2]
    left = names[(k + 1) // 2:][::-1]  # worst last in the list, so its leader line is the outermost

    # the axis runs from rank 1 to k, longer if the CD interval drawn along it would not fit
    low, high = 1.0, float(max(k, math.ceil(1.0 + critical_difference)))
    axis_inches = max(3.0, 0.55 * (high - low))
    per_inch = (high - low) / axis_inches
    widths = {c: _text_inches(labels[c], bold=c == names[0]) for c in names}
    margin_right = max(widths[c] for c in right) + 0.45
    margin_left = (max(widths[c] for c in left) if left else 0.0) + 0.45
    width = axis_inches + margin_left + margin_right

    bar_rows = len(groups)
    label_rows = max(len(right), len(left))
    top_rows, bottom_pad = 2.6, 0.8  # CD interval and tick labels above the axis; a little room below the last label
    height_rows = top_rows + bar_rows + label_rows + bottom_pad
    figure = pyplot().figure(figsize=(width, height_rows * ROW_INCHES + 0.3 + (0.25 if title else 0.0)), dpi=100)
    axes = figure.add_axes((0.0, 0.0, 1.0, 1.0 - (0.25 / figure.get_figheight() if title else 0.0)))
    axes.set_axis_off()
    # x in rank units, increasing to the left (best on the right); y in rows, the axis at 0, labels below
    axes.set_xlim(high + margin_left * per_inch, low - margin_right * per_inch)
    axes.set_ylim(-(bar_rows + label_rows + bottom_pad), top_rows)

    axes.plot([low, high], [0, 0], color=AXIS_COLOR, lw=1.0, gid="cd-axis")
    for tick in range(int(low), int(high) + 1):
        axes.plot([tick, tick], [0, 0.25], color=AXIS_COLOR, lw=1.0)
        axes.text(tick, 0.4, str(tick), ha="center", va="bottom", fontsize=FONT_SIZE, color=AXIS_COLOR)
        if tick < high:
            axes.plot([tick + 0.5, tick + 0.5], [0, 0.12], color=AXIS_COLOR, lw=0.7)

    # the critical difference, from the worst end of the axis
    y_cd = 1.9
    axes.plot([high, high - critical_difference], [y_cd, y_cd], color=CD_COLOR, lw=1.6, gid="cd-interval",
              solid_capstyle="butt")
    for end in (high, high - critical_difference):
        axes.plot([end, end], [y_cd - 0.15, y_cd + 0.15], color=CD_COLOR, lw=1.0)
    axes.text(high - critical_difference / 2, y_cd + 0.2, cd_label, ha="center", va="bottom", fontsize=FONT_SIZE,
              color=CD_COLOR)

    for row, group in enumerate(groups, start=1):
        ranks = [average_ranks[c] for c in group]
        axes.plot([min(ranks), max(ranks)], [-row * 0.9 + 0.3] * 2, color=GROUP_COLOR, lw=3.5,
                  solid_capstyle="round", gid="cd-group")

    first_label_y = -(bar_rows * 0.9 + 1.0)
    for members, x_end, align in ((right, low - 0.3 * per_inch, "left"), (left, high + 0.3 * per_inch, "right")):
        for row, name in enumerate(members):
            y = first_label_y - row
            rank = average_ranks[name]
            axes.plot([rank, rank, x_end], [0, y, y], color=LEADER_COLOR, lw=0.8, gid="cd-leader")
            offset = -0.06 * per_inch if align == "left" else 0.06 * per_inch
            axes.text(x_end + offset, y, labels[name], ha=align, va="center", fontsize=FONT_SIZE,
                      fontweight="bold" if name == names[0] else "normal", gid="cd-name")
    if title:
        figure.suptitle(title, fontsize=9, y=1.0 - 0.05 / figure.get_figheight(), va="top")
    return figure
