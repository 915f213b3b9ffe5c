"""The critical-difference diagram: its structure, read from the Figure's artists and the PNG's header, not pixels."""

from __future__ import annotations

import io
import struct

import numpy as np
import pytest

from harness.cd_diagram import critical_difference_figure
from harness.plots import pyplot
from harness.score import across

from test_across import PAPER_SCORES

LONG_NAMES = [f"all-MiniLM-L6-v2/last/{p}/center+whiten/umap5/hdbscan{m}leaf" for p in ("mean", "max", "cls")
              for m in (5, 15, 30)]


def parts(figure, gid):
    axes = figure.axes[0]
    return [a for a in [*axes.lines, *axes.texts] if a.get_gid() == gid]


def png_size(figure) -> tuple[int, int]:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100)
    data = buffer.getvalue()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def verdict_figure(verdict):
    return critical_difference_figure(verdict.average_ranks, verdict.critical_difference, verdict.groups,
                                      cd_label=f"CD = {verdict.critical_difference:.2f}")


def spread_verdict(n_datasets: int, names: list[str], seed: int = 1):
    rng = np.random.default_rng(seed)
    matrix = rng.normal(size=(n_datasets, len(names))) + np.linspace(0, 2.5, len(names))
    return across.across_verdict({f"d{i}": dict(zip(names, row)) for i, row in enumerate(matrix)}, metric="ari")


CASES = {
    # Demšar (2006) Figure 1(a): at alpha = 0.10 two groups, {C4.5+m+cf, C4.5+m, C4.5+cf} and {C4.5+cf, C4.5}
    "paper at 0.10": lambda: across.across_verdict(PAPER_SCORES, metric="AUC", alpha=0.10, correct_ties=False),
    "paper at 0.05": lambda: across.across_verdict(PAPER_SCORES, metric="AUC", correct_ties=False),
    "nine long names": lambda: spread_verdict(6, LONG_NAMES),
    "all separated": lambda: across.across_verdict(
        {f"d{i}": {"a": 3.0, "b": 2.0, "c": 1.0} for i in range(40)}, metric="ari"),
    "two configurations": lambda: across.across_verdict(
        {d: {"a": s, "b": 0.5} for d, s in zip("xyz", (0.9, 0.8, 0.1))}, metric="ari"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_one_bar_per_maximal_group_spanning_its_members(case):
    verdict = CASES[case]()
    figure = verdict_figure(verdict)
    bars = parts(figure, "cd-group")
    assert len(bars) == len(verdict.groups)
    for bar, group in zip(bars, verdict.groups):
        ranks = [verdict.average_ranks[c] for c in group]
        assert sorted(bar.get_xdata()) == pytest.approx([min(ranks), max(ranks)])
    pyplot().close(figure)


def test_the_paper_example_draws_figure_1a_groups():
    verdict = CASES["paper at 0.10"]()
    assert len(verdict.groups) == 2
    separated = CASES["all separated"]()
    assert separated.groups == () and not parts(verdict_figure(separated), "cd-group")


@pytest.mark.parametrize("case", sorted(CASES))
def test_every_configuration_is_named_at_its_average_rank_best_to_the_right(case):
    verdict = CASES[case]()
    figure = verdict_figure(verdict)
    names = [t.get_text() for t in parts(figure, "cd-name")]
    assert sorted(names) == sorted(f"{c} ({r:.2f})" for c, r in verdict.average_ranks.items())
    leaders = parts(figure, "cd-leader")
    assert sorted(line.get_xdata()[0] for line in leaders) == pytest.approx(sorted(verdict.average_ranks.values()))
    left, right = figure.axes[0].get_xlim()
    assert left > right  # rank 1 (the best) on the right, as in Demšar's diagrams
    (interval,) = parts(figure, "cd-interval")
    assert abs(np.diff(interval.get_xdata())[0]) == pytest.approx(verdict.critical_difference)
    (axis,) = parts(figure, "cd-axis")
    assert min(axis.get_xdata()) == 1.0 and max(axis.get_xdata()) >= len(verdict.average_ranks)
    # the CD is a scale bar along the axis: the axis is long enough to hold it (two configurations: CD > 1)
    assert min(axis.get_xdata()) <= min(interval.get_xdata()) and max(interval.get_xdata()) <= max(axis.get_xdata())
    pyplot().close(figure)


@pytest.mark.parametrize("case", sorted(CASES))
def test_renders_to_png_with_every_text_inside_the_image(case):
    figure = verdict_figure(CASES[case]())
    width, height = png_size(figure)
    assert np.allclose((width, height), figure.get_size_inches() * 100, atol=1)  # Agg truncates to whole pixels
    renderer = figure.canvas.get_renderer()
    for text in figure.axes[0].texts:
        box = text.get_window_extent(renderer)
        assert box.x0 >= 0 and box.y0 >= 0 and box.x1 <= width and box.y1 <= height, text.get_text()
    pyplot().close(figure)


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="at least 2 configurations"):
        critical_difference_figure({"a": 1.0}, 1.0, [])
    with pytest.raises(ValueError, match="unknown"):
        critical_difference_figure({"a": 1.0, "b": 2.0}, 1.0, [("a", "c")])
    with pytest.raises(ValueError, match="'critical_difference' parameter must be > 0"):
        critical_difference_figure({"a": 1.0, "b": 2.0}, 0.0, [])
