"""The edge of ``harness plan --estimate``: measure small runs on this machine, cache them, and size the sweep's work.

A calibration is measured once per model and machine (model identity, CPU model, core count, library versions)
and kept as JSON under the cache folder; the formulas that scale it to a sweep are in harness.engine.estimate.
"""

from __future__ import annotations

import json
import os
import platform
import time
from collections import Counter
from dataclasses import asdict, dataclass
from importlib import metadata
from pathlib import Path
from typing import Any, Callable

import numpy as np

from harness.engine.estimate import Calibration, EncodeRates, PlannedStage, padded_batches
from harness.keys import settings_key

# How many calibrations this process has measured, by key (a cached one is read, not counted).
MEASURED: Counter = Counter()

CALIBRATION_LIBRARIES = ("torch", "transformers", "sentence-transformers", "tokenizers", "umap-learn", "pynndescent",
                         "numba", "hdbscan", "scikit-learn", "numpy", "scipy")
TRANSFORMER_FAMILIES = ("sentence_transformer", "transformer")
# Fixed-length passes: padded lengths (capped at the model's limit), a few hundred texts in all.
CALIBRATION_LENGTHS = (32, 128, 256)
# One batch size for every calibration, so that one serves every sweep of a model: on CPU the cost per text changes
# little with the batch size once batches hold a few dozen texts (rule of thumb, not measured here).
BATCH_SIZE = 32


@dataclass(frozen=True)
class CalibrationSizes:
    """How much work the calibration measures. The defaults put UMAP's larger fit above 4,096 points, where it
    switches to NN-descent; tests use smaller sizes (a different cache key)."""

    texts: int = 256  # town-request texts encoded at their own lengths; their vectors seed the reduction fits
    tokens_per_length: int = 8192  # tokens run at each fixed length
    umap_small: int = 1000
    umap_large: int = 5000
    agglomerative: int = 2000


DEFAULT_SIZES = CalibrationSizes()


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def machine_identity() -> dict[str, Any]:
    versions = {}
    for name in CALIBRATION_LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "absent"
    return {"cpu": cpu_model(), "cores": os.cpu_count(), "versions": versions}


def model_identity(resolved, spec) -> dict[str, Any]:
    return {"model": resolved.name, "weights": resolved.weights_digest, "family": resolved.family,
            "device": resolved.device.key, "backend": spec.backend, "trust_remote_code": spec.trust_remote_code}


# Enters every calibration's key: raise it when what measured_calibration times changes, so that no calibration
# measured by the former code is read back (2: the neighbour graph timed as the run's graph stage computes it;
# 3: NN-descent's first-call compile apart from UMAP's; 4: the baseline with MLflow's store and pandas loaded).
CALIBRATION_VERSION = 4


def calibration_key(resolved, spec, sizes: CalibrationSizes = DEFAULT_SIZES) -> str:
    return settings_key({"model": model_identity(resolved, spec), "machine": machine_identity(), "sizes": asdict(sizes),
                         "version": CALIBRATION_VERSION})


def calibrated(resolved, spec, cache_root: Path, sizes: CalibrationSizes = DEFAULT_SIZES) -> Calibration:
    """This model's calibration on this machine: read from ``cache_root/calibration/KEY.json``, else measured
    and written there (to a temporary name, then renamed, so a killed process leaves no half file)."""
    key = calibration_key(resolved, spec, sizes)
    path = Path(cache_root) / "calibration" / f"{key}.json"
    if path.is_file():
        return Calibration.from_json(json.loads(path.read_text())["calibration"])
    calibration = measured_calibration(resolved, spec, sizes)
    MEASURED[key] += 1
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    temporary.write_text(json.dumps({"model": model_identity(resolved, spec), "machine": machine_identity(),
                                     "sizes": asdict(sizes), "calibration": calibration.as_json()}, indent=2))
    temporary.replace(path)
    return calibration


def _resident_mb() -> float:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _with_a_run_s_libraries() -> None:
    """Import what every run holds besides the model and the numeric libraries (MLflow with an open SQLite store,
    pandas and pyarrow for the artifacts), so that the baseline the calibration reads includes them (about 110 MB,
    measured here)."""
    import tempfile

    import pandas  # noqa: F401
    import pyarrow  # noqa: F401
    from mlflow.tracking import MlflowClient

    with tempfile.TemporaryDirectory() as folder:
        MlflowClient(tracking_uri=f"sqlite:///{folder}/store.db").search_experiments()


def _timed(compute: Callable[[], Any]) -> tuple[Any, float]:
    started = time.perf_counter()
    result = compute()
    return result, time.perf_counter() - started


def _encode_rates(resolved, spec, sizes: CalibrationSizes) -> tuple[EncodeRates, np.ndarray, float]:
    """Fit linear and quadratic seconds per padded length from passes at fixed lengths and one of real texts."""
    from scipy.optimize import nnls

    from harness.datasets.synthetic import SyntheticSource, synthetic_corpus
    from harness.embed.encode import pooled_variants, token_counts
    from harness.embed.models import loaded_encoder

    encoder, load = _timed(lambda: loaded_encoder(resolved, None, spec.trust_remote_code))  # the model's own limit
    baseline = _resident_mb()
    specials = encoder.tokenizer.num_special_tokens_to_add(pair=False)
    texts = synthetic_corpus(SyntheticSource(source="synthetic", n_texts=sizes.texts, seed=0)).texts
    counts, tokenizing = _timed(lambda: token_counts(encoder, texts))
    variant = ("last", "mean")
    rows, targets = [], []

    def measured_pass(batch_texts: list[str], batch_counts: np.ndarray):
        output, seconds = _timed(lambda: pooled_variants(encoder, batch_texts, [variant], batch_size=BATCH_SIZE,
                                                          counts=batch_counts)[variant])
        batches = padded_batches(batch_counts, BATCH_SIZE, encoder.max_length, specials)
        rows.append([sum(r * length for r, length in batches), sum(r * length**2 for r, length in batches)])
        targets.append(seconds)
        return output

    vectors = measured_pass(texts, counts)
    for length in sorted({min(length, encoder.max_length) for length in CALIBRATION_LENGTHS}):
        n = max(16, sizes.tokens_per_length // length)
        fixed = [" ".join(["the"] * (length - specials))] * n
        measured_pass(fixed, token_counts(encoder, fixed))
    (linear, quadratic), _ = nnls(np.asarray(rows, dtype=float), np.asarray(targets))
    rates = EncodeRates(linear=float(linear), quadratic=float(quadratic),
                        tokenize_per_token=tokenizing / max(int(counts.sum()), 1), load_seconds=load,
                        max_length=int(encoder.max_length))
    return rates, vectors, baseline


def measured_calibration(resolved, spec, sizes: CalibrationSizes = DEFAULT_SIZES) -> Calibration:
    """Run the calibration: the forward pass (transformer families), then UMAP at a small and a larger size (the
    exact and the NN-descent neighbour search), PCA, HDBSCAN, k-means and agglomerative on points shaped like the
    model's vectors (its real vectors of 256 texts, resampled with noise)."""
    import warnings

    import umap  # noqa: F401  imported before the baseline is read: every run imports it

    _with_a_run_s_libraries()

    from harness.geometry.cluster import AgglomerativeSettings, HdbscanSettings, KmeansSettings, cluster_labels
    from harness.geometry.reduce import PcaSettings, UmapSettings, neighbour_graph, reduced

    if resolved.family in TRANSFORMER_FAMILIES and spec.backend == "torch":
        rates, vectors, baseline = _encode_rates(resolved, spec, sizes)
    else:
        rates, baseline = None, _resident_mb()
        vectors = np.random.default_rng(0).standard_normal((sizes.texts, resolved.width)).astype(np.float32)
    rng = np.random.default_rng(0)
    spread = vectors.std(axis=0, keepdims=True) * 0.1
    points = vectors[rng.integers(len(vectors), size=sizes.umap_large)] + rng.standard_normal(
        (sizes.umap_large, vectors.shape[1])).astype(np.float32) * spread
    umap_settings = UmapSettings(method="umap", n_components=5, n_neighbors=15, min_dist=0.0, metric="cosine")
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore")
        # Timed as the run computes them: the neighbour graph stage (exact, or NN-descent), then a fit given it;
        # "fit" is the two together, so that the layout's share is fit - knn (estimate.umap_layout_rates).
        warm_graph = neighbour_graph(points[:300], "cosine", 15, "exact")
        _, warmup = _timed(lambda: reduced(points[:300], umap_settings, 0, warm_graph))
        small_graph, knn_small = _timed(lambda: neighbour_graph(points[:sizes.umap_small], "cosine", 15, "exact"))
        _, layout_small = _timed(lambda: reduced(points[:sizes.umap_small], umap_settings, 0, small_graph))
        knn = lambda: neighbour_graph(points, "cosine", 15, "nndescent")  # noqa: E731
        _, compile_knn = _timed(knn)  # the first NN-descent of a process compiles pynndescent's numba functions
        large_graph, knn_large = _timed(knn)
        nndescent_warmup = max(compile_knn - knn_large, 0.0)  # paid only by a process that runs NN-descent
        embedded, layout_large = _timed(lambda: reduced(points, umap_settings, 0, large_graph))
        fit_small, fit_large = knn_small + layout_small, knn_large + layout_large
    _, pca = _timed(lambda: reduced(points, PcaSettings(method="pca", n_components=10), 0))
    _, hdbscan = _timed(lambda: cluster_labels(embedded, HdbscanSettings(method="hdbscan", min_cluster_size=15), 0, None))
    _, kmeans = _timed(lambda: cluster_labels(embedded, KmeansSettings(method="kmeans", k=10, n_init=10), 0, None))
    _, agglomerative = _timed(lambda: cluster_labels(
        embedded[:sizes.agglomerative], AgglomerativeSettings(method="agglomerative", k=10), 0, None))
    d = int(points.shape[1])
    return Calibration(
        encode=rates, width=d, baseline_rss_mb=baseline,
        umap={"n_small": sizes.umap_small, "knn_small": knn_small, "fit_small": fit_small, "n_large": sizes.umap_large,
              "knn_large": knn_large, "fit_large": fit_large, "n_neighbors": 15, "n_components": 5, "d": d,
              "warmup": warmup, "warmup_nndescent": nndescent_warmup},
        hdbscan={"n": sizes.umap_large, "d": 5, "seconds": hdbscan},
        kmeans={"n": sizes.umap_large, "d": 5, "k": 10, "n_init": 10, "seconds": kmeans},
        pca={"n": sizes.umap_large, "d": d, "n_components": 10, "seconds": pca},
        agglomerative={"n": sizes.agglomerative, "seconds": agglomerative},
    )


def planned_stages(prepared, is_cached: Callable[[str, str], bool],
                   calibrations: dict[str, Calibration]) -> list[PlannedStage]:
    """The stages of a prepared sweep that will run (not cached; shared stages once, as ``harness plan`` counts
    them), each with its sizes. Token counts come from the model's tokenizer over the real corpus."""
    from transformers import AutoTokenizer

    from harness.embed.layers import output_width
    from harness.engine.estimate import STAGES, reduced_width
    from harness.engine.plan import needed_stages
    from harness.geometry.cluster import resolved_k
    from harness.geometry.transforms import chain_width

    trials = prepared.trials
    planned: list[PlannedStage] = []
    tokenizers: dict[Any, Any] = {}
    for kind in STAGES:
        for key, trial in needed_stages(trials, kind).items():
            corpus = prepared.corpora[trial.dataset]
            n, width = corpus.n_texts, trial.resolved_model.width
            # The vectors' width after each stage: the layer choice widens the model's (concatenated layers), a
            # whitening step narrows it, and the reducer sets it for the clustering.
            pooled_width = output_width(trial.layers, width)
            transformed_width = chain_width(list(trial.transform), pooled_width)
            if kind == "encode":
                sharing = [t for t in trials if t.stages["encode"].key == key]
                pools = {p for t in sharing for p in (t.stages["pool"].key, t.own_stages["pool"].key)}
                missing = [p for p in pools if not is_cached("pool", p)]
                if not missing and is_cached("encode", key):
                    continue
                cal = calibrations[trial.model.label]
                if trial.model.family in TRANSFORMER_FAMILIES:
                    folder = trial.resolved_model.folder
                    if folder not in tokenizers:
                        tokenizers[folder] = AutoTokenizer.from_pretrained(str(folder))
                    tokenizer = tokenizers[folder]
                    ids = tokenizer(corpus.texts, add_special_tokens=False, truncation=False, verbose=False)["input_ids"]
                    counts = np.fromiter((len(i) for i in ids), dtype=np.int64, count=n)
                    specials = tokenizer.num_special_tokens_to_add(pair=False)
                    max_length = trial.model.max_length or (cal.encode.max_length if cal.encode is not None else 512)
                else:
                    counts, specials, max_length = np.ones(n, dtype=np.int64), 0, 1
                planned.append(PlannedStage("encode", n, width, {
                    "batch_size": trial.model.batch_size, "max_length": max_length, "specials": specials,
                    "long_texts": trial.model.long_texts, "variants": len(missing)}, counts=counts, rates=cal.encode,
                    key=key))
                continue
            if is_cached(kind, key):
                continue
            if kind == "pool":
                settings = {"dtype": trial.stages["pool"].settings["dtype"]}
                width = pooled_width
            elif kind == "transform":  # the chain's input is the pooled vectors; what it holds is its output
                stage = trial.stages["transform"] if trial.stages["transform"].key == key else trial.own_stages["transform"]
                settings = {"steps": len(stage.settings["chain"])}
                width = transformed_width
            elif kind == "graph":
                settings = dict(trial.stages["graph"].settings)
                width = transformed_width
            elif kind == "reduce":
                settings = trial.reducer.as_params()
                width = transformed_width
            else:
                settings = trial.clusterer.as_params()
                if settings["method"] == "kmeans":
                    settings["k"] = resolved_k(trial.clusterer, corpus.n_classes)
                width = reduced_width(trial.reducer.as_params(), transformed_width)
            planned.append(PlannedStage(kind, n, width, settings, key=key))
    return planned
