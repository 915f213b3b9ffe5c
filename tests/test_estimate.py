"""harness plan --estimate: the growth formulas against hand-computed cases, each scaling rule, the CLI's table, and
the calibration cache (measured once per model and machine)."""

from __future__ import annotations

import inspect
import math
import re

import numpy as np
import pytest

from harness.engine import estimate as est
from harness.engine.estimate import Calibration, EncodeRates, PlannedStage

from conftest import write_sweep

RATES = EncodeRates(linear=1e-3, quadratic=1e-5, tokenize_per_token=1e-6, load_seconds=2.0, max_length=512)
UMAP_CAL = {"n_small": 1000, "knn_small": 0.1, "fit_small": 2.1, "n_large": 5000, "knn_large": 3.0,
            "fit_large": 7.0, "n_neighbors": 15, "n_components": 5, "d": 384, "warmup": 5.0,
            "warmup_nndescent": 3.0}
CAL = Calibration(encode=RATES, width=384, umap=UMAP_CAL,
                  hdbscan={"n": 5000, "d": 5, "seconds": 1.0},
                  kmeans={"n": 5000, "d": 5, "k": 10, "n_init": 10, "seconds": 2.0},
                  pca={"n": 5000, "d": 384, "n_components": 10, "seconds": 0.5},
                  agglomerative={"n": 2000, "seconds": 0.4}, baseline_rss_mb=500.0)


# -- hand-computed cases -------------------------------------------------------------------------------------------
def test_padded_batches_follow_the_encoder_by_hand():
    # counts 10, 3, 300 with 2 special tokens: 12, 5 and (truncated) 128; longest first, batches of two.
    assert est.padded_batches(np.array([10, 3, 300]), 2, 128, 2) == [(2, 128), (1, 5)]
    # chunk_mean: windows of 126 tokens: 300 -> 126, 126, 48, each with 2 specials -> 128, 128, 50.
    assert est.padded_batches(np.array([10, 3, 300]), 2, 128, 2, "chunk_mean") == [(2, 128), (2, 50), (1, 5)]


def test_padded_batches_match_the_encoders_own_batching():
    """The batches harness.embed.encode runs (length_sorted_batches over the same lengths) have these sizes and lengths."""
    from harness.embed.encode import length_sorted_batches

    counts = np.random.default_rng(0).integers(1, 400, size=103)
    lengths = np.minimum(counts + 2, 128)
    theirs = [(len(b), int(lengths[b].max())) for b in length_sorted_batches(lengths, 16)]
    assert est.padded_batches(counts, 16, 128, 2) == theirs


def test_encode_seconds_by_hand():
    # 2 x (1e-3 x 128 + 1e-5 x 128^2) + 1 x (1e-3 x 5 + 1e-5 x 25) = 0.58368 + 0.00525; 313 tokens x 1e-6; load 2.
    assert est.encode_seconds(RATES, np.array([10, 3, 300]), 2, 128, 2) == pytest.approx(0.58893 + 0.000313 + 2.0)


def test_umap_layout_rates_solve_the_two_fits():
    # Both calibration sizes run 500 epochs: work 1000x15x500 = 7.5e6 and 5000x15x500 = 3.75e7 edge-epochs;
    # time after the neighbour search 2.0 and 4.0 s: rate 2/3e7, fixed 2 - 7.5e6 x 2/3e7 = 1.5 s.
    fixed, rate = est.umap_layout_rates(UMAP_CAL)
    assert rate == pytest.approx(2.0 / 3e7)
    assert fixed == pytest.approx(1.5)


def test_memory_by_hand():
    assert est.vector_bytes(1000, 384) == 1_536_000
    assert est.vector_bytes(1000, 384, "float16") == 768_000
    # As measured earlier (README): about 0.77 GB for agglomerative ward at 10,000 texts; 8 n^2 bytes is 0.8 GB.
    assert est.agglomerative_bytes(10_000) == 800_000_000
    # kNN graph 1000 x 15 edges: 12 bytes each, the symmetrised fuzzy graph 2 x 12, and a float32 copy of the input.
    assert est.umap_transient_bytes(1000, 384, 15) == 15_000 * 12 + 30_000 * 12 + 1_536_000


def test_parallel_seconds():
    assert est.parallel_seconds([4.0, 4.0, 4.0, 4.0], 2) == 8.0
    assert est.parallel_seconds([10.0, 1.0, 1.0], 4) == 10.0  # never less than the longest task
    assert est.parallel_seconds([], 3) == 0.0


# -- the constants read from the libraries' own source ---------------------------------------------------------------
def test_umap_thresholds_are_umap_learns():
    """umap-learn's source: exact neighbours below 4096 points; 500 layout epochs up to 10,000 points, else 200."""
    import umap.umap_ as umap_module

    fit = inspect.getsource(umap_module.UMAP.fit)
    assert f"< {est.UMAP_EXACT_BELOW}" in fit
    embedding = inspect.getsource(umap_module.simplicial_set_embedding)
    assert f"<= {est.UMAP_EPOCHS_SWITCH}" in embedding
    assert str(est.UMAP_SMALL_EPOCHS) in embedding and str(est.UMAP_LARGE_EPOCHS) in embedding


# -- every scaling rule ---------------------------------------------------------------------------------------------
def _compute_only(rates: EncodeRates) -> EncodeRates:
    return EncodeRates(linear=rates.linear, quadratic=rates.quadratic, tokenize_per_token=0.0, load_seconds=0.0,
                       max_length=rates.max_length)


SCALING = [
    # (rule, value at the base size, value at the changed size, expected ratio)
    ("doubling texts doubles the forward pass",
     lambda: est.encode_seconds(_compute_only(RATES), np.full(64, 40), 16, 128, 2),
     lambda: est.encode_seconds(_compute_only(RATES), np.full(128, 40), 16, 128, 2), 2.0),
    ("doubling length doubles the linear part",
     lambda: est.encode_seconds(EncodeRates(1e-3, 0.0, 0, 0, 512), np.full(64, 38), 16, 512, 2),
     lambda: est.encode_seconds(EncodeRates(1e-3, 0.0, 0, 0, 512), np.full(64, 78), 16, 512, 2), 2.0),
    ("doubling length quadruples attention",
     lambda: est.encode_seconds(EncodeRates(0.0, 1e-5, 0, 0, 512), np.full(64, 38), 16, 512, 2),
     lambda: est.encode_seconds(EncodeRates(0.0, 1e-5, 0, 0, 512), np.full(64, 78), 16, 512, 2), 4.0),
    ("tokens beyond max_length cost nothing under truncate",
     lambda: est.encode_seconds(_compute_only(RATES), np.full(64, 200), 16, 128, 2),
     lambda: est.encode_seconds(_compute_only(RATES), np.full(64, 400), 16, 128, 2), 1.0),
    ("under chunk_mean, twice the windows cost twice",
     lambda: est.encode_seconds(_compute_only(RATES), np.full(64, 126), 16, 128, 2, "chunk_mean"),
     lambda: est.encode_seconds(_compute_only(RATES), np.full(64, 252), 16, 128, 2, "chunk_mean"), 2.0),
    ("exact neighbours: doubling n quadruples", lambda: est.umap_knn_seconds(UMAP_CAL, 1000, 384, 15),
     lambda: est.umap_knn_seconds(UMAP_CAL, 2000, 384, 15), 4.0),
    ("NN-descent: doubling n multiplies by 2^1.14", lambda: est.umap_knn_seconds(UMAP_CAL, 10_000, 384, 15),
     lambda: est.umap_knn_seconds(UMAP_CAL, 20_000, 384, 15), 2**1.14),
    ("NN-descent: doubling k doubles", lambda: est.umap_knn_seconds(UMAP_CAL, 10_000, 384, 15),
     lambda: est.umap_knn_seconds(UMAP_CAL, 10_000, 384, 30), 2.0),
    ("layout: above 10,000 points 200 epochs instead of 500", lambda: est.umap_epochs(10_000),
     lambda: est.umap_epochs(10_001), 200 / 500),
    ("PCA: doubling n doubles", lambda: est.pca_seconds(CAL.pca, 1000, 384), lambda: est.pca_seconds(CAL.pca, 2000, 384), 2.0),
    ("PCA: doubling d quadruples", lambda: est.pca_seconds(CAL.pca, 1000, 384), lambda: est.pca_seconds(CAL.pca, 1000, 768), 4.0),
    ("HDBSCAN: n log n", lambda: est.hdbscan_seconds(CAL.hdbscan, 10_000, 5),
     lambda: est.hdbscan_seconds(CAL.hdbscan, 20_000, 5), 2 * math.log(20_000) / math.log(10_000)),
    ("k-means: doubling n doubles", lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 10, 10),
     lambda: est.kmeans_seconds(CAL.kmeans, 2000, 5, 10, 10), 2.0),
    ("k-means: doubling k doubles", lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 10, 10),
     lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 20, 10), 2.0),
    ("k-means: doubling d doubles", lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 10, 10),
     lambda: est.kmeans_seconds(CAL.kmeans, 1000, 10, 10, 10), 2.0),
    ("k-means: doubling n_init doubles", lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 10, 10),
     lambda: est.kmeans_seconds(CAL.kmeans, 1000, 5, 10, 20), 2.0),
    ("agglomerative time: doubling n quadruples", lambda: est.agglomerative_seconds(CAL.agglomerative, 1000),
     lambda: est.agglomerative_seconds(CAL.agglomerative, 2000), 4.0),
    ("agglomerative memory: doubling n quadruples", lambda: est.agglomerative_bytes(1000),
     lambda: est.agglomerative_bytes(2000), 4.0),
    ("float16 storage halves the vectors", lambda: est.vector_bytes(1000, 384),
     lambda: est.vector_bytes(1000, 384, "float16"), 0.5),
]


@pytest.mark.parametrize("rule,base,changed,ratio", SCALING, ids=[case[0] for case in SCALING])
def test_scaling_rule(rule, base, changed, ratio):
    assert changed() / base() == pytest.approx(ratio)


# -- a sweep's estimate -----------------------------------------------------------------------------------------------
def _stages(n: int) -> list[PlannedStage]:
    umap = {"method": "umap", "n_components": 5, "n_neighbors": 15, "min_dist": 0.0, "metric": "cosine"}
    return [
        PlannedStage("encode", n, 384, {"batch_size": 32, "max_length": 128, "specials": 2, "long_texts": "truncate",
                                        "variants": 2}, counts=np.full(n, 40)),
        PlannedStage("pool", n, 384, {"dtype": "float16"}), PlannedStage("pool", n, 384, {"dtype": "float16"}),
        PlannedStage("transform", n, 384, {"steps": 0}),
        # one neighbour graph shared by both UMAP fits (they differ only by seed): exact up to 20,000 texts
        PlannedStage("graph", n, 384, {"metric": "cosine", "n_neighbors": 15, "method": "exact"}),
        PlannedStage("reduce", n, 384, umap), PlannedStage("reduce", n, 384, umap),
        PlannedStage("cluster", n, 5, {"method": "hdbscan", "min_cluster_size": 15, "min_samples": None,
                                       "cluster_selection_method": "eom"}),
        PlannedStage("cluster", n, 5, {"method": "kmeans", "k": 20, "n_init": 10}),
    ]


def test_sweep_estimate_sums_its_stages_and_names_the_dominant_one():
    estimate = est.sweep_estimate(_stages(20_000), CAL)
    layout_one = est.umap_layout_seconds(UMAP_CAL, 20_000, 15)
    assert estimate.stages["reduce"].seconds == pytest.approx(2 * layout_one + UMAP_CAL["warmup"])
    # the search is paid once, by the graph stage, at the exact search's n^2 d growth from the calibration
    assert estimate.stages["graph"].seconds == pytest.approx(
        UMAP_CAL["knn_small"] * (20_000 / UMAP_CAL["n_small"]) ** 2 * (384 / UMAP_CAL["d"]))
    assert estimate.stages["graph"].count == 1
    assert estimate.stages["reduce"].count == 2 and estimate.stages["pool"].count == 2
    assert estimate.total_seconds == pytest.approx(sum(s.seconds for s in estimate.stages.values()))
    assert estimate.dominant == max(estimate.stages, key=lambda k: estimate.stages[k].seconds)
    # held: token counts, two float16 pooled variants, two float32 reductions, two label vectors; working set: the
    # largest single stage's (here UMAP's graph and input copy).
    held = 20_000 * 8 + 2 * 20_000 * 384 * 2 + 20_000 * 15 * 2 * 8 + 2 * 20_000 * 5 * 4 + 2 * 20_000 * 8
    working = max(est.umap_transient_bytes(20_000, 384, 15), 2 * est.vector_bytes(20_000, 384),
                  est.hdbscan_transient_bytes(20_000, 5), 20_000 * 15 * 12 + est.vector_bytes(20_000, 384))
    assert estimate.peak_mb == pytest.approx(500.0 + (held + working) / 2**20)


def test_workers_divide_the_stages_that_parallelise():
    one, four = est.sweep_estimate(_stages(20_000), CAL), est.sweep_estimate(_stages(20_000), CAL, workers=4)
    load = RATES.load_seconds
    assert four.stages["encode"].seconds == pytest.approx((one.stages["encode"].seconds - load) / 4 + load)
    layout_one = est.umap_layout_seconds(UMAP_CAL, 20_000, 15)  # two fits on four workers: the longest one bounds it
    assert four.stages["reduce"].seconds == pytest.approx(layout_one + UMAP_CAL["warmup"])
    assert four.stages["graph"].seconds == one.stages["graph"].seconds  # one graph: nothing to divide
    assert four.stages["transform"].seconds == one.stages["transform"].seconds


# -- the calibration edge and the CLI ---------------------------------------------------------------------------------
SWEEP = """
name: estimated
datasets:
  - {{source: synthetic, n_texts: 150, seed: 1}}
models:
  - {{name: {model}, max_length: 64}}
grid:
  pooling: [mean, max]
  reduce:
    - {{method: umap, n_components: 5, n_neighbors: 10}}
    - {{method: pca, n_components: 8}}
  cluster:
    - {{method: hdbscan, min_cluster_size: 10}}
    - {{method: kmeans, k: labels}}
  seeds: [0]
"""

def _small_sizes():
    from harness.engine.calibration import CalibrationSizes

    return CalibrationSizes(texts=48, tokens_per_length=512, umap_small=200, umap_large=400, agglomerative=100)


def test_calibration_is_cached_per_model(tmp_path, tiny_model_dir, char_model_dir):
    from harness.engine.calibration import MEASURED, calibrated, calibration_key
    from harness.engine.runner import prepared_sweep

    sizes = _small_sizes()
    models = {}
    for name, folder in (("tiny", tiny_model_dir), ("char", char_model_dir)):
        prepared = prepared_sweep(write_sweep(tmp_path, SWEEP.format(model=folder), f"{name}.yaml"))
        spec = prepared.sweep.models[0]
        models[name] = (prepared.models[spec.label], spec)
    keys = {name: calibration_key(*model, sizes) for name, model in models.items()}
    assert keys["tiny"] != keys["char"]
    before = MEASURED[keys["tiny"]]
    first = calibrated(*models["tiny"], tmp_path / "cache", sizes)
    assert MEASURED[keys["tiny"]] == before + 1
    again = calibrated(*models["tiny"], tmp_path / "cache", sizes)
    assert MEASURED[keys["tiny"]] == before + 1  # read back, not measured again
    assert again == first
    assert first.encode is not None and first.encode.linear + first.encode.quadratic > 0
    calibrated(*models["char"], tmp_path / "cache", sizes)
    assert MEASURED[keys["char"]] == 1  # another model: a calibration of its own
    assert len(list((tmp_path / "cache" / "calibration").glob("*.json"))) == 2


def test_plan_estimate_prints_each_stage_the_total_and_the_dominant_stage(tmp_path, tiny_model_dir, capsys):
    from harness.cli import STAGE_LABELS, main
    from harness.engine.calibration import MEASURED

    sweep = write_sweep(tmp_path, SWEEP.format(model=tiny_model_dir))
    cache = tmp_path / "cache"
    measured_before = sum(MEASURED.values())
    assert main(["plan", str(sweep), "--estimate", "--cache-dir", str(cache)]) == 0
    first = capsys.readouterr().out
    assert sum(MEASURED.values()) == measured_before + 1
    plan_part, estimate_part = first.split("estimate for this machine")
    for label in STAGE_LABELS.values():
        # The estimate counts the same stages to run as the plan's own table (needed minus cached).
        to_run = re.search(rf"^{label}\s+\d+\s+\d+\s+(\d+)", plan_part, re.M).group(1)
        assert re.search(rf"^{label}\s+{to_run}\s+[\d.]+\s+\d+%\s+\d+", estimate_part, re.M), label
    # 2 poolings x (PCA + UMAP, one seed) = 4 reductions, each with 2 clusterings; one forward pass.
    assert re.search(r"^reductions\s+4\s", estimate_part, re.M) and re.search(r"^clusterings\s+8\s", estimate_part, re.M)
    assert re.search(r"^forward passes\s+1\s", estimate_part, re.M)
    assert re.search(r"^total\s+[\d.]+\s+\d+$", estimate_part, re.M)
    assert re.search(r"^dominant stage: (forward passes|pooled variants|transforms|neighbour graphs|reductions|clusterings) \(\d+%",
                     estimate_part, re.M)
    assert main(["plan", str(sweep), "--estimate", "--cache-dir", str(cache)]) == 0
    second = capsys.readouterr().out
    assert sum(MEASURED.values()) == measured_before + 1  # the second plan reads the calibration back
    assert second.split("estimate for this machine")[1] == first.split("estimate for this machine")[1]


def test_each_model_loads_once_per_worker_and_its_load_is_not_divided():
    # Two models on four workers: each worker loads each model once (in parallel with the other workers), so the
    # wall time holds both loads in full and a quarter of the compute.
    slow_load = EncodeRates(linear=RATES.linear, quadratic=RATES.quadratic, tokenize_per_token=RATES.tokenize_per_token,
                            load_seconds=RATES.load_seconds + 4.0, max_length=RATES.max_length)
    encode = {"batch_size": 32, "max_length": 128, "specials": 2, "long_texts": "truncate", "variants": 1}
    stages = [PlannedStage("encode", 5000, 384, encode, counts=np.full(5000, 40), rates=RATES),
              PlannedStage("encode", 5000, 384, encode, counts=np.full(5000, 40), rates=slow_load)]
    one, four = est.sweep_estimate(stages, CAL), est.sweep_estimate(stages, CAL, workers=4)
    loads = RATES.load_seconds + slow_load.load_seconds
    assert one.stages["encode"].seconds == pytest.approx(sum(
        est.encode_seconds(r, np.full(5000, 40), 32, 128, 2) for r in (RATES, slow_load)))
    assert four.stages["encode"].seconds == pytest.approx((one.stages["encode"].seconds - loads) / 4 + loads)
    # One model over two datasets, one process: two forward passes, one load.
    same = [PlannedStage("encode", 5000, 384, encode, counts=np.full(5000, 40), rates=RATES) for _ in range(2)]
    compute = est.encode_seconds(RATES, np.full(5000, 40), 32, 128, 2) - RATES.load_seconds
    assert est.sweep_estimate(same, CAL).stages["encode"].seconds == pytest.approx(2 * compute + RATES.load_seconds)


WIDTHS_SWEEP = """
name: widths
datasets:
  - {{source: synthetic, n_texts: 120, seed: 1}}
models:
  - {{name: {model}, max_length: 32}}
grid:
  pooling: [mean]
  layers: [last, concat_last_4]
  transform: [[], [{{method: whiten, k: 8}}]]
  reduce:
    - {{method: umap, n_components: 5, n_neighbors: 10}}
    - {{method: pca, n_components: 3}}
  cluster:
    - {{method: kmeans, k: labels}}
  seeds: [0]
"""


def test_the_planned_widths_are_the_widths_the_run_computes(tmp_path):
    # Time and memory scale with the vectors' width: the estimate must use the width each stage really has
    # (concatenated layers widen, whitening narrows, the reducer sets the clustering's), taken here from the
    # arrays the stage executor computes for the same sweep.
    from harness.engine.calibration import planned_stages
    from harness.engine.runner import prepared_sweep
    from harness.engine.stages import StageExecutor

    from conftest import _minilm_tokenizer, _tiny_bert

    model = _tiny_bert(tmp_path / "four_layers", _minilm_tokenizer(), layers=4)  # concat_last_4 needs 4 hidden states
    prepared = prepared_sweep(write_sweep(tmp_path, WIDTHS_SWEEP.format(model=model)))
    planned = planned_stages(prepared, lambda kind, key: False, {m.label: CAL for m in prepared.sweep.models})
    executor = StageExecutor(prepared.corpora, prepared.trials, None)
    computed = {}  # stage key -> the width of the array that stage holds (the graph and a reduction: of their input)
    for trial in prepared.trials:
        transformed = executor.transformed(trial).shape[1]
        computed[trial.stages["pool"].key] = executor.pooled(trial).shape[1]
        computed[trial.stages["transform"].key] = transformed
        computed[trial.stages["reduce"].key] = transformed
        if "graph" in trial.stages:
            computed[trial.stages["graph"].key] = transformed
        computed[trial.stages["cluster"].key] = executor.reduced(trial).shape[1]
    planned_widths = {s.key: s.width for s in planned if s.kind != "encode"}
    assert planned_widths == computed
    by_kind = lambda kind: {computed[s.key] for s in planned if s.kind == kind}  # noqa: E731
    assert by_kind("pool") == {32, 128} and by_kind("transform") == {32, 128, 8}  # the cases this test is about


def test_nn_descent_compile_is_paid_only_by_a_plan_that_runs_nn_descent():
    # pynndescent compiles on its first call in a process; an exact graph never calls it.
    exact = est.sweep_estimate(_stages(20_000), CAL)
    approximate = [PlannedStage("graph", 30_000, 384, {"metric": "cosine", "n_neighbors": 15, "method": "nndescent"})]
    assert exact.stages["graph"].seconds == pytest.approx(
        UMAP_CAL["knn_small"] * (20_000 / UMAP_CAL["n_small"]) ** 2 * (384 / UMAP_CAL["d"]))
    assert est.sweep_estimate(approximate, CAL).stages["graph"].seconds == pytest.approx(
        est.umap_knn_seconds(UMAP_CAL, 30_000, 384, 15) + UMAP_CAL["warmup_nndescent"])
    # and each compile is said where it is counted
    assert exact.stages["reduce"].notes == ["includes numba's first-fit compile"] and not exact.stages["graph"].notes
    assert est.sweep_estimate(approximate, CAL).stages["graph"].notes == ["includes pynndescent's first-call compile"]
