"""The benchmark's side-by-side timing (benchmarks/run.py): every side runs on every part of the work in every
round, each order of the sides equally often; the parts keep the whole corpus's batches; stage seconds are summed
by kind."""

from __future__ import annotations

import importlib.util
import itertools
import json
import os
import sys
from collections import Counter

import numpy as np
import pytest

from conftest import REPO
from harness.embed.encode import length_sorted_batches


@pytest.fixture(scope="module")
def bench():
    saved = dict(os.environ)  # the module sets defaults in the environment when imported
    spec = importlib.util.spec_from_file_location("bench_run_for_tests", REPO / "benchmarks" / "run.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # its dataclasses look their module up there
    spec.loader.exec_module(module)
    os.environ.clear()
    os.environ.update(saved)
    yield module
    sys.modules.pop(spec.name, None)


COUNT_CASES = [
    ("ties everywhere", np.full(200, 7)),
    ("distinct, descending", np.arange(130, 0, -1)),
    ("distinct, ascending", np.arange(1, 131)),
    ("few lengths", np.random.default_rng(0).integers(3, 6, size=257)),
    ("many lengths", np.random.default_rng(1).integers(1, 300, size=2000)),
    ("one text", np.array([5])),
    ("fewer texts than a batch", np.array([4, 9, 9, 2])),
]


def back_and_forth(n_batches: int, slices: int) -> list[int]:
    """The part each batch goes to: 0, 1, ..., k-1, then k-1, ..., 0, and again."""
    cycle = list(range(slices)) + list(reversed(range(slices)))
    return [cycle[b % len(cycle)] for b in range(n_batches)]


@pytest.mark.parametrize("name, counts", COUNT_CASES, ids=[c[0] for c in COUNT_CASES])
@pytest.mark.parametrize("batch_size, slices", [(64, 6), (64, 4), (16, 6), (7, 2), (1, 3), (1, 1)])
def test_each_part_sorted_again_gives_back_its_share_of_the_whole_corpus_batches(bench, name, counts, batch_size,
                                                                                  slices):
    whole = length_sorted_batches(counts, batch_size)
    if len(whole) < slices:
        with pytest.raises(ValueError, match=f"--texts {(slices - 1) * batch_size + 1} or more"):
            bench.dealt_parts(counts, batch_size, slices)
        return
    parts = bench.dealt_parts(counts, batch_size, slices)
    assert len(parts) == slices
    assert sorted(np.concatenate(parts).tolist()) == list(range(counts.size))  # every text in exactly one part
    owners = back_and_forth(len(whole), slices)
    for number, part in enumerate(parts):
        # What a side does with the part: sort its texts by length and batch them, as pooled_variants does.
        own = [part[batch] for batch in length_sorted_batches(counts[part], batch_size)]
        expected = [batch for batch, owner in zip(whole, owners) if owner == number]
        assert len(own) == len(expected)
        assert all(np.array_equal(a, b) for a, b in zip(own, expected))


def test_the_bare_pass_gets_the_batches_the_tool_runs(bench, tiny_model_dir):
    # The real pooled_variants and the real transformer: every input the tool hands the transformer is recorded
    # and compared with the batches the benchmark's bare pass runs, for each part of a corpus with texts longer
    # than the model's window (32 tokens), so that truncation is in the comparison.
    from dataclasses import replace

    from harness.embed.encode import pooled_variants, token_counts
    from harness.embed.models import loaded_encoder, resolve_model

    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 32, False)
    rng = np.random.default_rng(3)
    words = ["permit", "pothole", "the", "council", "bins", "late", "street", "lamp", "a", "water"]
    texts = [" ".join(rng.choice(words, size=int(rng.integers(1, 60)))) for _ in range(90)]
    received = []

    def recording(**inputs):
        received.append({name: tensor.clone() for name, tensor in inputs.items() if name != "output_hidden_states"})
        return encoder.transformer(**inputs)

    tool = replace(encoder, transformer=recording)
    parts = [[texts[i] for i in part] for part in bench.dealt_parts(token_counts(encoder, texts), 8, 3)]
    for part in [texts, *parts]:  # the corpus in its own (unsorted) order too: a part is already sorted
        received.clear()
        pooled_variants(tool, part, [("last", "mean")], batch_size=8)
        bare = bench.tokenised_batches(encoder, part, 8)
        assert len(received) == len(bare) > 1
        for ours, theirs in zip(received, bare):
            assert set(ours) == set(theirs)
            assert all(torch_equal(ours[name], theirs[name]) for name in theirs)
    assert any(int(batch["attention_mask"].sum(dim=1).max()) == 32 for batch in received)  # a text was cut


@pytest.mark.parametrize("slices", [1, 2, 4, 6])
def test_the_fewest_texts_the_benchmark_asks_for_make_enough_batches(bench, slices):
    fewest = bench.minimum_texts(slices)
    assert len(bench.dealt_parts(np.ones(fewest), bench.BATCH, slices)) == slices
    if fewest > 1:
        with pytest.raises(ValueError):
            bench.dealt_parts(np.ones(fewest - 1), bench.BATCH, slices)


@pytest.mark.parametrize("chosen, texts, stopped_by", [
    (["encode"], 320, "encode"), (["onnx"], 192, "onnx"), (["halving"], 50, "halving"),
    (["rerun_fraction"], 39, "rerun_fraction"),
    (["bootstrap_speedup", "encode"], 320, "encode"), (["encode", "onnx"], 250, "encode"),
    (["onnx", "encode"], 250, "encode"), (["onnx", "encode"], 150, "onnx"),
])
def test_too_few_texts_for_a_group_stop_before_anything_runs_or_is_written(bench, monkeypatch, capsys, tmp_path,
                                                                           chosen, texts, stopped_by):
    monkeypatch.setattr(bench, "REPO", tmp_path)
    monkeypatch.setattr(bench, "RESULTS", tmp_path / "results" / "benchmarks.json")
    ran = []
    monkeypatch.setattr(bench, "GROUPS", {name: bench.Group(name, lambda n, r, name=name: ran.append(name) or {}, True)
                                          for name in bench.GROUPS})
    arguments = [word for name in chosen for word in ("--only", name)]
    monkeypatch.setattr(sys, "argv", ["run.py", *arguments, "--texts", str(texts)])
    with pytest.raises(SystemExit) as stopped:
        bench.main()
    assert stopped.value.code == 2
    error = capsys.readouterr().err.strip().splitlines()[-1]
    assert error.endswith(f"--texts {texts}: the {stopped_by} group needs at least {bench.MINIMUM_TEXTS[stopped_by]} texts")
    assert ran == [] and list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("name", ["encode", "onnx", "halving", "rerun_fraction"])
def test_the_fewest_texts_a_group_accepts_pass_the_check(bench, monkeypatch, tmp_path, name):
    monkeypatch.setattr(bench, "REPO", tmp_path)
    monkeypatch.setattr(bench, "RESULTS", tmp_path / "results" / "benchmarks.json")
    ran = []
    monkeypatch.setattr(bench, "GROUPS", {name: bench.Group(name, lambda n, r: ran.append(n) or {}, True)})
    monkeypatch.setattr(sys, "argv", ["run.py", "--only", name, "--texts", str(bench.MINIMUM_TEXTS[name])])
    assert bench.main() == 0
    assert ran == [bench.MINIMUM_TEXTS[name]]


def test_the_round_figures_of_the_encode_group(bench):
    # Hand-made rounds: the tool 10, 12, 11 s; the single encode 8, 12, 10 s; the bare pass 9, 12, 11.5 s.
    rounds = {"tool": [10.0, 12.0, 11.0], "single": [8.0, 12.0, 10.0], "bare": [9.0, 12.0, 11.5]}
    ratios = bench.encode_round_ratios(rounds, t_other=5.0, n_last=4, n_other=8)
    assert ratios["over_single"] == pytest.approx([1.25, 1.0, 1.1])
    assert ratios["efficiency"] == pytest.approx([0.9, 1.0, 11.5 / 11.0])
    assert ratios["loop"] == pytest.approx([(32 + 40) / 10, (48 + 40) / 12, (40 + 40) / 11])


@pytest.mark.parametrize("tool_last, t_other, met", [
    # Worked by hand, medians of five: (tool / single, bare / tool, loop / tool)
    (9.0, 5.0, (True, True, False)),  # 1.0 <= 1.05; 1.0 >= 0.95; loop 7.33 < 8
    (11.6, 5.0, (False, False, False)),  # 1.0545 > 1.05; 0.948 < 0.95; loop 7.27 < 8
    (9.0, 10.0, (True, True, True)),  # as the first; loop 11.2 >= 8
])
def test_each_encode_figure_is_the_median_of_its_own_rounds(bench, tool_last, t_other, met):
    rounds = {"tool": [10.0, 12.0, 11.0, 9.0, tool_last], "single": [8.0, 12.0, 10.0, 9.5, 11.0],
              "bare": [9.0, 12.0, 11.5, 8.0, 11.0]}
    entries = bench.encode_entries(rounds, t_other=t_other, n_last=4, n_other=8)
    tool, single, bare = rounds["tool"], rounds["single"], rounds["bare"]
    expected = {"variants_over_single_encode": [tool[i] / single[i] for i in range(5)],
                "forward_efficiency": [bare[i] / tool[i] for i in range(5)],
                "loop_over_variants": [(4 * single[i] + 8 * t_other) / tool[i] for i in range(5)]}
    for figure, ratios in expected.items():
        entry = entries[figure]
        assert entry["round_ratios"] == pytest.approx(ratios)
        assert entry["value"] == pytest.approx(sorted(ratios)[2])  # the median of five
        assert entry["rounds"] == rounds
    assert tuple(entries[figure]["met"] for figure in expected) == met
    tool_median, single_median, bare_median = (sorted(rounds[side])[2] for side in ("tool", "single", "bare"))
    assert entries["variants_over_single_encode"]["seconds"] == {"tool_12_variants": tool_median,
                                                                 "single_encode": single_median}
    assert entries["forward_efficiency"]["seconds"] == {"bare_forward": bare_median, "tool_12_variants": tool_median}
    assert entries["loop_over_variants"]["seconds"] == {
        "user_loop_12_variants_estimated": 4 * single_median + 8 * t_other, "tool_12_variants": tool_median,
        "one_last_layer_encode": single_median, "one_hidden_states_pass": t_other}


@pytest.mark.parametrize("kind", ["rerun_fraction", "halving"])
def test_the_fewest_texts_of_a_sweep_group_are_what_the_runner_accepts(bench, tmp_path, kind):
    # The runner's own checks (prepared_sweep, check_against_data) at the minimum and one below it.
    from harness.engine.runner import check_against_data, loaded_corpora, prepared_sweep
    from harness.errors import HarnessError

    def sweeps(n_texts: int) -> list[str]:
        # The texts the groups run: rerun_figures and halving_group build their sweeps with these functions.
        return list(bench.rerun_sweeps(n_texts) if kind == "rerun_fraction" else bench.halving_sweeps(n_texts).values())

    def refusals(n_texts: int) -> list[str]:
        found = []
        for number, text in enumerate(sweeps(n_texts)):
            path = tmp_path / f"{kind}_{n_texts}_{number}.yaml"
            path.write_text(text)
            try:
                prepared = prepared_sweep(path)
                check_against_data(prepared, loaded_corpora(prepared))
            except HarnessError as refused:
                found.append(str(refused))
        return found

    fewest = bench.MINIMUM_TEXTS[kind]
    assert refusals(fewest) == []
    assert refusals(fewest - 1)  # one text fewer is refused by a sweep check
    key = "grid.cluster[1]" if kind == "rerun_fraction" else "search.start_texts"
    assert all(str(tmp_path) in refusal and key in refusal for refusal in refusals(fewest - 1))


def test_the_guide_names_each_group_minimum(bench):
    guide = (REPO / "benchmarks" / "README.md").read_text()
    for name, fewest in bench.MINIMUM_TEXTS.items():
        assert f"`{name}` {fewest}" in guide, name
    for name in bench.FIXED_SIZE_GROUPS:
        assert f"`{name}`" in guide.split("`--texts N`", 1)[1].split("\n\n", 1)[0], name


@pytest.mark.parametrize("rounds, t_other, figure, target", [
    ({"tool": [1.05] * 3, "single": [1.0] * 3, "bare": [1.0] * 3}, 0.0, "variants_over_single_encode", 1.05),
    ({"tool": [1.0] * 3, "single": [1.0] * 3, "bare": [0.95] * 3}, 0.0, "forward_efficiency", 0.95),
    ({"tool": [2.0] * 3, "single": [2.0] * 3, "bare": [2.0] * 3}, 1.0, "loop_over_variants", 8.0),  # (4x2 + 8x1) / 2
])
def test_a_figure_exactly_at_its_target_meets_it(bench, rounds, t_other, figure, target):
    entry = bench.encode_entries(rounds, t_other=t_other, n_last=4, n_other=8)[figure]
    assert entry["value"] == target
    assert entry["met"] is True


@pytest.mark.parametrize("numerators, denominators, expected", [
    ([21.89, 21.77, 20.56], [14.13, 13.71, 12.5], [21.89 / 14.13, 21.77 / 13.71, 20.56 / 12.5]),
    ([1.0], [4.0], [0.25]), ([], [], []),
])
def test_round_ratios_pair_rounds(bench, numerators, expected, denominators):
    assert bench.round_ratios(numerators, denominators) == expected


def test_rounds_that_do_not_pair_up_are_refused(bench):
    with pytest.raises(ValueError, match="3 rounds against 2"):
        bench.round_ratios([1.0, 2.0, 3.0], [1.0, 2.0])


def test_the_results_file_keeps_each_figure_size_and_the_run_arguments_apart(bench, monkeypatch, tmp_path):
    monkeypatch.setattr(bench, "REPO", tmp_path)
    monkeypatch.setattr(bench, "RESULTS", tmp_path / "results" / "benchmarks.json")
    (tmp_path / "results").mkdir()
    bench.RESULTS.write_text(json.dumps({"figures": {"kept": {"value": 3.0, "target": "t", "met": True}}}))
    figure = {"value": 1.0, "target": ">= 0", "met": True}
    monkeypatch.setattr(bench, "GROUPS", {"g": bench.Group("g", lambda n, r: {
        "texts": 77, "shared": dict(figure), "own": {**figure, "texts": 5}}, True)})
    monkeypatch.setattr(sys, "argv", ["run.py", "--only", "g", "--texts", "300", "--repeats", "2"])
    assert bench.main() == 0
    written = json.loads(bench.RESULTS.read_text())["figures"]
    assert written["shared"]["texts"] == 77  # the group's size, said once for its figures
    assert written["own"]["texts"] == 5  # a figure's own size wins
    for name in ("shared", "own"):
        assert written[name]["run_arguments"] == {"texts": 300, "repeats": 2}
        assert "repeats" not in written[name]
        assert written[name]["value"] == 1.0 and "date" in written[name]
    assert written["kept"] == {"value": 3.0, "target": "t", "met": True}  # a figure of an earlier run stays


@pytest.mark.parametrize("option", ["--texts", "--repeats"])
def test_a_count_below_one_is_refused(bench, monkeypatch, capsys, option):
    monkeypatch.setattr(sys, "argv", ["run.py", "--only", "bootstrap_speedup", option, "0"])
    with pytest.raises(SystemExit) as stopped:
        bench.main()
    assert stopped.value.code == 2
    assert "expected a whole number, 1 or more" in capsys.readouterr().err


def test_the_single_encode_stands_for_a_last_layer_encode_only_for_a_mean_pooled_model(bench, tiny_model_dir):
    from sentence_transformers import SentenceTransformer
    from sentence_transformers.sentence_transformer.modules import Normalize, Pooling, Transformer

    transformer = Transformer(str(tiny_model_dir))
    width = transformer.get_embedding_dimension()
    for modules, accepted in [
        ([transformer, Pooling(width, pooling_mode="mean")], True),
        ([transformer, Pooling(width, pooling_mode="mean"), Normalize()], True),
        ([transformer, Pooling(width, pooling_mode="cls"), Normalize()], False),
        ([transformer, Pooling(width, pooling_mode="max")], False),
        ([transformer], False),
        ([transformer, Pooling(width, pooling_mode="mean"), Normalize(), Normalize()], False),
    ]:
        model = SentenceTransformer(modules=modules, device="cpu")
        for max_length in (model.max_seq_length, model.max_seq_length - 1, model.max_seq_length + 1):
            if accepted and max_length == model.max_seq_length:
                bench.check_last_layer_stand_in(model, max_length)
            else:
                with pytest.raises(SystemExit, match="no longer stands for a last-layer encode"):
                    bench.check_last_layer_stand_in(model, max_length)


def padded_characters(texts: list[str], batch_size: int) -> int:
    """Characters a batch-by-batch encode pads to, sorting by characters as SentenceTransformer.encode does
    (``np.argsort`` of minus each text's length; the total does not depend on how ties are ordered)."""
    lengths = np.sort(np.array([len(t) for t in texts]))[::-1]
    return int(sum(len(lengths[s:s + batch_size]) * lengths[s] for s in range(0, len(lengths), batch_size)))


def test_each_side_of_the_encode_group_runs_the_batches_it_would_run_over_the_whole_corpus(bench, tiny_model_dir):
    from harness.embed.models import loaded_encoder, resolve_model

    encoder = loaded_encoder(resolve_model(str(tiny_model_dir)), 32, False)
    rng = np.random.default_rng(5)
    words = ["bins", "collection", "missed", "on", "elm", "road", "again", "permit", "for", "a", "skip", "lorry"]
    texts = [" ".join(rng.choice(words, size=int(rng.integers(1, 40)))) for _ in range(400)]
    sides = bench.encode_inputs(encoder, texts, 6)
    # SentenceTransformer.encode's parts pad as its own whole-corpus sort does (parts dealt from that sort).
    assert sum(padded_characters(part, bench.BATCH) for part in sides.encode_parts) == padded_characters(texts, bench.BATCH)
    assert sorted(sum(sides.encode_parts, [])) == sorted(texts)
    # The bare pass runs, per part, the tool's batches of that part; the user's loop runs the whole corpus's.
    for part, batches in zip(sides.parts, sides.batches):
        assert [b["input_ids"].tolist() for b in batches] == [b["input_ids"].tolist()
                                                               for b in bench.tokenised_batches(encoder, part, bench.BATCH)]
    whole = bench.tokenised_batches(encoder, texts, bench.BATCH)
    assert sorted(b["input_ids"].tolist() for b in sides.all_batches) == sorted(b["input_ids"].tolist() for b in whole)


def test_the_rerun_stage_fraction_is_over_the_first_run(bench):
    stages = bench.stage_seconds([{"kind": "cluster", "seconds": 1.5}, {"kind": "map", "seconds": 2.5},
                                  {"kind": "score", "seconds": 1.0}])
    assert bench.stages_over(stages, 50.0) == pytest.approx(0.1)


def test_the_summary_says_when_each_figure_was_measured(bench):
    lines = bench.summary_lines({"b_figure": {"value": 0.5, "target": "<= 1", "met": True, "date": "2026-12-03 16:27:04"},
                                 "a_figure": {"value": 2.0, "target": ">= 3", "met": False}})
    assert lines[0].split() == ["figure", "value", "target", "met", "measured"]
    assert lines[1].split() == ["a_figure", "2.000", ">=", "3", "NO", "unknown"]
    assert lines[2].split() == ["b_figure", "0.500", "<=", "1", "yes", "2026-12-03", "16:27:04"]


def torch_equal(left, right) -> bool:
    return left.shape == right.shape and bool((left == right).all())


@pytest.mark.parametrize("constant, sides", [("ENCODE_SLICES", 3), ("ONNX_SLICES", 2)])
def test_each_group_turns_over_a_number_of_parts_that_runs_every_order_equally(bench, constant, sides):
    # Checked here, not when the group runs: the ONNX group would otherwise fail after its model export.
    slices = getattr(bench, constant)
    assert slices % len(list(itertools.permutations(range(sides)))) == 0


@pytest.mark.parametrize("value", [0.0, 0.049, 0.05, 0.0501, 0.2])
@pytest.mark.parametrize("forward_passes", [None, 0, 1])
@pytest.mark.parametrize("umap_fits", [None, 0, 2])
@pytest.mark.parametrize("map_fits", [None, 0, 1])
def test_the_rerun_target_counts_the_sweep_reductions_not_the_winner_map(bench, value, forward_passes, umap_fits,
                                                                         map_fits):
    work = {name: count for name, count in (("forward_passes", forward_passes), ("umap_fits", umap_fits),
                                            ("map_fits", map_fits)) if count is not None}
    expected = value <= 0.05 and not forward_passes and not umap_fits
    assert bench.rerun_met(value, work) is expected


@pytest.mark.parametrize("sides, repeats, slices",
                         [(n, r, k * f) for n, f in ((1, 1), (2, 2), (3, 6)) for r in (1, 2, 3) for k in (1, 2)])
def test_every_side_runs_on_every_part_in_every_order_equally(bench, sides, repeats, slices, monkeypatch):
    names = [f"side{i}" for i in range(sides)]
    calls: list[tuple[str, int]] = []
    ticks = {"now": 0.0}

    def action(name):
        def run(part):
            calls.append((name, part))
            ticks["now"] += 1.0 + part  # a part's cost: 1 + its index, so that sums are checkable
        return run

    # A clock that moves only when an action runs: the sums per round must then be exact (a real clock's cannot).
    monkeypatch.setattr(bench.time, "perf_counter", lambda: ticks["now"])
    seconds = bench.interleaved_seconds({name: action(name) for name in names}, repeats, slices)

    assert set(seconds) == set(names)
    assert all(seconds[name] == [sum(1.0 + part for part in range(slices))] * repeats for name in names)
    steps = [calls[i:i + sides] for i in range(0, len(calls), sides)]
    assert len(steps) == repeats * slices
    for number, step in enumerate(steps):
        assert {part for _, part in step} == {number % slices}  # the step runs one part ...
        assert sorted(name for name, _ in step) == names  # ... on every side once
    for first in range(0, len(steps), slices):  # within each round, every order of the sides equally often
        orders = Counter(tuple(name for name, _ in step) for step in steps[first:first + slices])
        assert set(orders) == set(itertools.permutations(names))
        assert len(set(orders.values())) == 1


@pytest.mark.parametrize("sides, slices", [(2, 1), (2, 3), (3, 1), (3, 2), (3, 3), (3, 4), (3, 9)])
def test_a_round_that_cannot_run_every_order_equally_is_refused(bench, sides, slices):
    actions = {f"side{i}": (lambda part: None) for i in range(sides)}
    with pytest.raises(ValueError, match="orders"):
        bench.interleaved_seconds(actions, 1, slices)


def test_stage_seconds_sum_each_kind(bench):
    log = [{"kind": "cluster", "seconds": 0.5, "peak_rss_mb": 1.0}, {"kind": "score", "seconds": 0.25},
           {"kind": "cluster", "seconds": 1.25}, {"kind": "map", "seconds": 2.0}, {"kind": "cluster", "seconds": 0.0},
           {"kind": "map", "seconds": 0.125}]
    assert bench.stage_seconds(log) == {"cluster": 1.75, "score": 0.25, "map": 2.125}
    assert bench.stage_seconds([]) == {}
