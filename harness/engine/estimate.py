"""What a sweep will cost before it runs: seconds and peak memory per stage, from a calibration scaled by growth rules.

Pure formulas only. The calibration (a few hundred texts through the model, small UMAP, HDBSCAN, k-means, PCA and
agglomerative fits on this machine) is measured by ``harness.engine.calibration``; here each stage's measured cost is
scaled from the calibration's size to the sweep's by the growth rule written beside it. Where a rule is a rule of
thumb rather than a published complexity, the comment says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Optional

import numpy as np

# umap-learn picks an exact nearest-neighbour search (all pairwise distances) below this many points and
# NN-descent (pynndescent) from it on (umap/umap_.py, nearest_neighbors: ``if X.shape[0] < 4096``).
UMAP_EXACT_BELOW = 4096
# umap-learn's default number of layout epochs: 500 up to 10,000 points, 200 above (umap/umap_.py, simplicial_set_embedding).
UMAP_SMALL_EPOCHS, UMAP_LARGE_EPOCHS, UMAP_EPOCHS_SWITCH = 500, 200, 10_000
# NN-descent's empirical cost grows as about n^1.14 (Dong, Charikar and Li, "Efficient k-nearest neighbor graph
# construction for generic similarity measures", WWW 2011, section 4: fitted exponents 1.11 to 1.14).
NN_DESCENT_EXPONENT = 1.14
# Agglomerative clustering with ward/average/complete linkage keeps every pairwise distance: about 8 n^2 bytes,
# measured in benchmarks/agglomerative_memory.py (0.77 GB at 10,000 texts); time by the nearest-neighbour chain,
# O(n^2) (Mullner, "Modern hierarchical, agglomerative clustering algorithms", 2011).
AGGLOMERATIVE_BYTES_PER_PAIR = 8
DTYPE_BYTES = {"float32": 4, "float16": 2}
STAGES = ("encode", "pool", "transform", "graph", "reduce", "cluster")  # plan.PLANNED_KINDS (not imported: pure)


@dataclass(frozen=True)
class EncodeRates:
    """Forward-pass cost per text of padded length L: linear + quadratic * L^2 seconds (attention is quadratic in
    the padded length, the feed-forward layers linear), fitted on texts of fixed lengths; plus tokenising per token
    and the model's load."""

    linear: float
    quadratic: float
    tokenize_per_token: float
    load_seconds: float
    max_length: int  # the model's own limit on tokens per text (a sweep's max_length may set a lower one)


@dataclass(frozen=True)
class Calibration:
    """Seconds measured on this machine at small sizes (each entry: the size it was measured at and its seconds)."""

    encode: Optional[EncodeRates]
    width: int  # the model's vector width, the d of the calibration vectors
    umap: dict[str, float]  # n_small, knn_small, fit_small, n_large, knn_large, fit_large, n_neighbors, n_components, d,
    # warmup (UMAP's first-fit compile), warmup_nndescent (pynndescent's first-call compile)
    hdbscan: dict[str, float]  # n, d, seconds
    kmeans: dict[str, float]  # n, d, k, n_init, seconds
    pca: dict[str, float]  # n, d, n_components, seconds
    agglomerative: dict[str, float]  # n, seconds
    baseline_rss_mb: float  # resident memory of a process holding the model and the libraries, before any data

    def as_json(self) -> dict[str, Any]:
        out = {k: v for k, v in self.__dict__.items() if k != "encode"}
        out["encode"] = None if self.encode is None else dict(self.encode.__dict__)
        return out

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> "Calibration":
        encode = None if data["encode"] is None else EncodeRates(**data["encode"])
        return cls(**{**data, "encode": encode})


# -- the forward pass --------------------------------------------------------------------------------------------
def padded_batches(counts: np.ndarray, batch_size: int, max_length: int, specials: int,
                   long_texts: str = "truncate") -> list[tuple[int, int]]:
    """(rows, padded length) of each batch the forward pass runs, as harness.embed.encode builds them: pieces sorted by
    length, longest first; under ``truncate`` a text keeps its first max_length tokens (special tokens included),
    under ``chunk_mean`` it is split into windows of max_length - specials tokens."""
    counts = np.asarray(counts, dtype=np.int64)
    room = max_length - specials
    if long_texts == "chunk_mean":
        windows = np.maximum(1, -(-counts // room))
        full = np.repeat(np.full(counts.size, room), windows - 1)
        last = counts - (windows - 1) * room
        lengths = np.concatenate([full, last]) + specials
    else:
        lengths = np.minimum(counts + specials, max_length)
    ordered = np.sort(lengths)[::-1]
    return [(int(ordered[i:i + batch_size].size), int(ordered[i])) for i in range(0, ordered.size, batch_size)]


def encode_seconds(rates: EncodeRates, counts: np.ndarray, batch_size: int, max_length: int, specials: int,
                   long_texts: str = "truncate") -> float:
    """One forward pass over a corpus: every batch's rows x (linear L + quadratic L^2), tokenising every token,
    and loading the model once."""
    compute = sum(rows * (rates.linear * length + rates.quadratic * length**2)
                  for rows, length in padded_batches(counts, batch_size, max_length, specials, long_texts))
    return compute + rates.tokenize_per_token * float(np.sum(counts)) + rates.load_seconds


# -- reductions ---------------------------------------------------------------------------------------------------
def umap_epochs(n: int) -> int:
    return UMAP_SMALL_EPOCHS if n <= UMAP_EPOCHS_SWITCH else UMAP_LARGE_EPOCHS


def umap_knn_seconds(cal: dict[str, float], n: int, d: int, n_neighbors: int) -> float:
    """The neighbour search. Exact below 4,096 points: all pairwise distances, n^2 d. NN-descent above: n^1.14
    (Dong et al. 2011), times k and d (each local join compares more and longer vectors: rule of thumb)."""
    if n < UMAP_EXACT_BELOW:
        return cal["knn_small"] * (n / cal["n_small"]) ** 2 * (d / cal["d"])
    return (cal["knn_large"] * (n / cal["n_large"]) ** NN_DESCENT_EXPONENT
            * (n_neighbors / cal["n_neighbors"]) * (d / cal["d"]))


def graph_seconds(cal: dict[str, float], n: int, d: int, n_neighbors: int, method: str) -> float:
    """The neighbour-graph stage (harness.geometry.reduce.neighbour_graph), computed once and shared by every UMAP
    fit on the same vectors, metric and n_neighbors: exact (all pairwise distances, n^2 d, scaled from the
    calibration's exact search) up to harness.geometry.reduce.EXACT_NEIGHBOURS_UP_TO texts, NN-descent above (as
    umap_knn_seconds)."""
    if method == "exact":
        return cal["knn_small"] * (n / cal["n_small"]) ** 2 * (d / cal["d"])
    return umap_knn_seconds(cal, n, d, n_neighbors)


def umap_layout_seconds(cal: dict[str, float], n: int, n_neighbors: int) -> float:
    """A UMAP fit given its neighbour graph: the fuzzy set and the layout, no search."""
    fixed, per_edge_epoch = umap_layout_rates(cal)
    return fixed + per_edge_epoch * n * n_neighbors * umap_epochs(n)


def umap_layout_rates(cal: dict[str, float]) -> tuple[float, float]:
    """(fixed seconds per fit, seconds per edge-epoch) solved from the two calibration fits' time after the
    neighbour search: the layout's stochastic gradient descent visits every edge of the kNN graph (n x k) once
    per epoch (McInnes, Healy and Melville 2018, section 3 and appendix on complexity)."""
    work = [cal[f"n_{s}"] * cal["n_neighbors"] * umap_epochs(int(cal[f"n_{s}"])) for s in ("small", "large")]
    rest = [max(cal[f"fit_{s}"] - cal[f"knn_{s}"], 0.0) for s in ("small", "large")]
    rate = max((rest[1] - rest[0]) / (work[1] - work[0]), 0.0) if work[1] != work[0] else rest[1] / work[1]
    return max(rest[0] - rate * work[0], 0.0), rate


def pca_seconds(cal: dict[str, float], n: int, d: int) -> float:
    """Full SVD of an n x d matrix (n > d): O(n d^2) (Golub and Van Loan, Matrix Computations, 4th ed., 8.6)."""
    return cal["seconds"] * (n / cal["n"]) * (d / cal["d"]) ** 2


# -- clusterings --------------------------------------------------------------------------------------------------
def hdbscan_seconds(cal: dict[str, float], n: int, d: int) -> float:
    """Boruvka on a kd-tree in low dimensions: O(n log n) (McInnes and Healy, "Accelerated hierarchical density
    clustering", 2017); linear in d: rule of thumb (tree queries slow down faster than that in high dimensions)."""
    return cal["seconds"] * (n * math.log(n)) / (cal["n"] * math.log(cal["n"])) * (d / cal["d"])


def kmeans_seconds(cal: dict[str, float], n: int, d: int, k: int, n_init: int) -> float:
    """Lloyd's algorithm: O(n k d) per iteration, for each of n_init starts (scikit-learn's KMeans documentation);
    the number of iterations taken as the calibration's: rule of thumb."""
    return cal["seconds"] * (n * k * d * n_init) / (cal["n"] * cal["k"] * cal["d"] * cal["n_init"])


def agglomerative_seconds(cal: dict[str, float], n: int) -> float:
    """Nearest-neighbour chain over the full distance matrix: O(n^2) (Mullner 2011)."""
    return cal["seconds"] * (n / cal["n"]) ** 2


# -- memory -------------------------------------------------------------------------------------------------------
def vector_bytes(n: int, d: int, dtype: str = "float32") -> int:
    return n * d * DTYPE_BYTES[dtype]


def umap_transient_bytes(n: int, d: int, n_neighbors: int) -> int:
    """While a UMAP fit runs: the kNN graph (int64 index + float32 distance per edge), the fuzzy graph in COO form
    (two int32 indices + a float32 weight, symmetrised so up to twice the edges), and a float32 copy of the input."""
    edges = n * n_neighbors
    return edges * (8 + 4) + 2 * edges * (4 + 4 + 4) + vector_bytes(n, d)


def hdbscan_transient_bytes(n: int, d: int) -> int:
    """A float64 copy of the points (harness.geometry.cluster casts them), the kd-tree, the minimum spanning tree
    and the condensed tree: about 100 bytes per point beyond the copy (rule of thumb)."""
    return n * d * 8 + 100 * n


def agglomerative_bytes(n: int) -> int:
    return AGGLOMERATIVE_BYTES_PER_PAIR * n * n


# -- one sweep ----------------------------------------------------------------------------------------------------
@dataclass
class StageEstimate:
    kind: str
    count: int = 0  # stages of this kind that will run
    seconds: float = 0.0
    held_bytes: int = 0  # outputs the run keeps in memory until it ends
    transient_bytes: int = 0  # the largest working memory of one stage of this kind while it runs
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class SweepEstimate:
    stages: dict[str, StageEstimate]
    baseline_rss_mb: float
    workers: int = 1

    @property
    def total_seconds(self) -> float:
        return sum(s.seconds for s in self.stages.values())

    @property
    def peak_mb(self) -> float:
        held = sum(s.held_bytes for s in self.stages.values())
        transient = max((s.transient_bytes for s in self.stages.values()), default=0)
        return self.baseline_rss_mb + (held + transient) / 2**20

    @property
    def dominant(self) -> str:
        return max(self.stages.values(), key=lambda s: s.seconds).kind


def stage_peak_mb(estimate: SweepEstimate, kind: str) -> float:
    """Peak resident memory by the end of a stage kind: baseline, everything held by it and the stages before, and
    the largest working memory seen so far (stages run in STAGES order per trial: a rough upper bound)."""
    upto = STAGES[: STAGES.index(kind) + 1]
    held = sum(estimate.stages[k].held_bytes for k in upto)
    transient = max(estimate.stages[k].transient_bytes for k in upto)
    return estimate.baseline_rss_mb + (held + transient) / 2**20


def parallel_seconds(task_seconds: list[float], workers: int) -> float:
    """Independent tasks spread over workers: their sum divided by the workers, but never less than the longest."""
    if not task_seconds:
        return 0.0
    return max(sum(task_seconds) / max(workers, 1), max(task_seconds))


@dataclass(frozen=True)
class PlannedStage:
    """One stage that will run, described by sizes only: n texts, the width of its input vectors, its settings
    (encode: batch_size, max_length, specials, long_texts, variants, dtype; pool: dtype; transform: steps;
    reduce and cluster: the method's settings, cluster with k resolved), and for encode the corpus's token counts."""

    kind: str
    n: int
    width: int
    settings: dict[str, Any]
    counts: Optional[np.ndarray] = None
    rates: Optional[EncodeRates] = None  # encode: this model's calibrated forward pass (None: the calibration's)
    key: str = ""  # the stage's key, where it comes from a plan


def reduced_width(settings: dict[str, Any], width: int) -> int:
    return width if settings["method"] == "none" else int(settings["n_components"])


def stage_cost(stage: PlannedStage, cal: Calibration) -> tuple[float, int, int]:
    """(seconds, bytes held until the run ends, working bytes while it runs) of one stage."""
    n, d, s = stage.n, stage.width, stage.settings
    if stage.kind == "encode":
        rates = stage.rates or cal.encode
        seconds = 0.0 if rates is None else encode_seconds(
            rates, stage.counts, s["batch_size"], s["max_length"], s["specials"], s["long_texts"])
        pieces = len(padded_batches(stage.counts, 1, s["max_length"], s["specials"], s["long_texts"]))
        # float32 outputs per variant while the pass runs (per window under chunk_mean, then a float64 sum)
        working = s["variants"] * (vector_bytes(pieces, d) + (vector_bytes(n, d) * 2 if pieces != n else 0))
        return seconds, n * 8, working  # held: the token counts (int64)
    if stage.kind == "pool":  # computed inside the forward pass; held at the storage dtype
        return 0.0, vector_bytes(n, d, s["dtype"]), 0
    if stage.kind == "transform":  # an empty chain returns its input; each step is a pass over n x d (rule of thumb)
        return 0.0, vector_bytes(n, d) if s["steps"] else 0, vector_bytes(n, d) * bool(s["steps"])
    if stage.kind == "graph":  # held: the (2, n, k) float64 graph; working: the search's own graph and a float32 copy
        edges = n * s["n_neighbors"]
        working = edges * (8 + 4) + vector_bytes(n, d)
        return graph_seconds(cal.umap, n, d, s["n_neighbors"], s["method"]), edges * 16, working
    method = s["method"]
    if stage.kind == "reduce":
        out = vector_bytes(n, reduced_width(s, d))
        if method == "umap":  # the search is the graph stage's; the fit builds the fuzzy set and the layout
            return umap_layout_seconds(cal.umap, n, s["n_neighbors"]), out, umap_transient_bytes(n, d, s["n_neighbors"])
        if method == "pca":
            return pca_seconds(cal.pca, n, d), out, 2 * vector_bytes(n, d)
        return 0.0, 0, 0
    if method == "hdbscan":
        return hdbscan_seconds(cal.hdbscan, n, d), n * 8, hdbscan_transient_bytes(n, d)
    if method == "kmeans":
        return kmeans_seconds(cal.kmeans, n, d, s["k"], s["n_init"]), n * 8, n * s["k"] * 8
    if method == "agglomerative":
        working = agglomerative_bytes(n) if s["linkage"] != "single" else 100 * n
        return agglomerative_seconds(cal.agglomerative, n), n * 8, working
    raise ValueError(f"no cost rule for {stage.kind} method {method!r}")


# Stage kinds that a Dask cluster runs on its workers: encode in chunks of texts, each reduction and its
# clusterings as tasks. Pooling and transforms run with them (inside the forward pass, inside the reduce task).
PARALLEL_KINDS = frozenset({"encode", "graph", "reduce", "cluster"})


def sweep_estimate(planned: list[PlannedStage], cal: Calibration, workers: int = 1) -> SweepEstimate:
    """Seconds and memory per stage kind for the stages that will run. With more than one worker, a kind that
    parallelises takes its stages' summed seconds over the workers (never less than its longest stage); the
    forward pass is split into chunks, so its compute divides while each worker loads the model once."""
    stages = {kind: StageEstimate(kind) for kind in STAGES}
    seconds: dict[str, list[float]] = {kind: [] for kind in STAGES}
    for stage in planned:
        took, held, working = stage_cost(stage, cal)
        entry = stages[stage.kind]
        entry.count += 1
        entry.held_bytes += held
        entry.transient_bytes = max(entry.transient_bytes, working)
        seconds[stage.kind].append(took)
    for kind, entry in stages.items():
        if kind == "encode":
            # A model is loaded once per process (per worker on a cluster, all loading at once), whatever the
            # number of forward passes it makes; the passes' compute divides over the workers.
            rates = [s.rates or cal.encode for s in planned if s.kind == "encode"]
            loads = [r.load_seconds if r is not None else 0.0 for r in rates]
            models = {id(r): load for r, load in zip(rates, loads)}
            compute = sum(max(t - load, 0.0) for t, load in zip(seconds[kind], loads))
            entry.seconds = compute / max(workers, 1) + sum(models.values())
        elif workers > 1 and kind in PARALLEL_KINDS:
            entry.seconds = parallel_seconds(seconds[kind], workers)
        else:
            entry.seconds = sum(seconds[kind])
    if any(s.kind == "reduce" and s.settings["method"] == "umap" for s in planned):
        stages["reduce"].seconds += cal.umap["warmup"]  # the first UMAP fit of a process compiles its numba functions
        stages["reduce"].notes.append("includes numba's first-fit compile")
    if any(s.kind == "graph" and s.settings["method"] == "nndescent" for s in planned):
        stages["graph"].seconds += cal.umap.get("warmup_nndescent", 0.0)  # and the first NN-descent, pynndescent's
        stages["graph"].notes.append("includes pynndescent's first-call compile")
    if any(s.kind == "encode" and (s.rates or cal.encode) is None for s in planned):
        stages["encode"].notes.append("family without a calibrated forward pass: not estimated")
    return SweepEstimate(stages=stages, baseline_rss_mb=cal.baseline_rss_mb, workers=workers)
