"""Computing a trial's stages, each once per key.

Outputs are looked up in memory, then in the on-disk cache, and only then
computed. One forward pass per encode key yields every pooling x layer variant
that any trial asks of it and that is not stored yet; when all are stored, the
model is not even loaded. Counters record the work done, so tests can check what
was (not) recomputed without timing anything.
"""

from __future__ import annotations

import resource
import tempfile
import time
from pathlib import Path
from collections import Counter, defaultdict
from typing import Any, Callable, Optional

import numpy as np

from harness._crashpoints import crash_point
from harness.datasets import Corpus
from harness.embed.encode import counts_of, long_text_figures, long_text_info, pooled_variants, token_ids
from harness.embed.models import LoadedEncoder, loaded_encoder
from harness.engine.cache import StageCache
from harness.engine.plan import ROW_INDEPENDENT_BACKENDS, Trial, make_stage, pool_stage
from harness.geometry.cluster import cluster_labels
from harness.geometry.reduce import neighbour_graph, reduced
from harness.geometry.transforms import transformed
from harness.keys import array_digest, settings_key
from harness.sweep import TRANSFORMER_FAMILIES

BatchCallback = Callable[[int], None]


class StageExecutor:
    def __init__(
        self,
        corpora: dict[str, Corpus],
        trials: list[Trial],
        cache: Optional[StageCache] = None,
        encode_progress: Optional[Callable[[int, str], tuple[BatchCallback, Callable[[], None]]]] = None,
    ):
        self.corpora = corpora
        self.cache = cache
        self.work: Counter = Counter()
        self.stage_log: list[dict[str, Any]] = []  # one entry per computed stage: kind, seconds, peak RSS so far
        self._outputs: dict[str, np.ndarray] = {}
        self._info: dict[str, dict[str, Any]] = {}
        self._encoders: dict[tuple, LoadedEncoder] = {}
        self._variants: dict[str, set] = defaultdict(set)
        self._encode_progress = encode_progress
        self._derived: dict[tuple, Any] = {}
        self._refused: dict[str, BaseException] = {}  # stage key -> the error a cluster worker raised computing it
        self._distances: tuple[str, np.ndarray] | None = None  # the last pooled vectors' cosine distances, by stage key
        for trial in trials:  # the pooling the chain is computed from, and the trial's own (one forward pass serves both)
            for pool in (trial.stages["pool"], trial.own_stages["pool"]):
                self._variants[trial.stages["encode"].key].add((trial.layers, pool.settings["pooling"]))

    # -- storage -------------------------------------------------------------------------------------------
    def _held(self, kind: str, key: str) -> bool:
        if key in self._outputs:
            return True
        if self.cache is not None:
            found = self.cache.get(kind, key)
            if found is not None:
                self._outputs[key], self._info[key] = found
                self.work[f"{kind}_cache_hits"] += 1
                return True
        return False

    def _keep(self, kind: str, key: str, array: np.ndarray, info: dict[str, Any]) -> None:
        self._outputs[key], self._info[key] = array, info
        if self.cache is not None:
            self.cache.put(kind, key, array, info)

    def _logged(self, kind: str, seconds: float) -> None:
        peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        self.stage_log.append({"kind": kind, "seconds": seconds, "peak_rss_mb": peak_kib / 1024})

    # -- encode and pool -------------------------------------------------------------------------------------
    def _encoder(self, trial: Trial) -> LoadedEncoder:
        spec = trial.model
        cache_key = (trial.resolved_model.folder, trial.resolved_model.family, spec.max_length, spec.trust_remote_code,
                     spec.backend, trial.resolved_model.device)
        if cache_key not in self._encoders:
            crash_point("model_load")
            encoder = loaded_encoder(trial.resolved_model, spec.max_length, spec.trust_remote_code)
            if spec.backend != "torch":
                from harness.embed.onnx_backend import onnx_encoder

                root = self.cache.root if self.cache is not None else Path(tempfile.mkdtemp(prefix="harness-onnx-"))
                # One export per encode key's model part: weights, model files, opset and exporting libraries.
                export = settings_key({k: trial.stages["encode"].settings.get(k) for k in ("weights", "model_files", "export")})
                folder = root / "onnx" / f"{trial.resolved_model.weights_digest}-{trial.resolved_model.family}-{export}"
                encoder = onnx_encoder(encoder, folder, int8=spec.backend == "onnx_int8")
            self._encoders[cache_key] = encoder
            self.work["model_loads"] += 1
        return self._encoders[cache_key]

    def _encode(self, trial: Trial) -> None:
        """Token counts, then one forward pass for every variant of this encode key not yet stored."""
        encode = trial.stages["encode"]
        corpus = self.corpora[trial.dataset]
        dtype = trial.stages["pool"].settings["dtype"]
        wanted = {variant: pool_stage(encode.key, *variant, dtype).key for variant in self._variants[encode.key]}
        missing = [variant for variant, key in wanted.items() if not self._held("pool", key)]
        if not missing and self._held("encode", encode.key):
            return
        if trial.model.family in ("static", "lexical", "precomputed"):
            self._encode_without_transformer(trial, wanted, missing)
            return
        encoder = self._encoder(trial)
        started = time.perf_counter()
        ids = token_ids(encoder, corpus.texts)  # once, for the counts and the batches
        if self._held("encode", encode.key):  # counted before: only pooled variants are missing
            counts = self._outputs[encode.key]
        else:
            counts = counts_of(ids)
            self._keep("encode", encode.key, counts, {
                "settings": encode.settings, **long_text_info(counts, encoder, trial.model.long_texts),
                "seconds": time.perf_counter() - started,
            })
        if not missing:
            return
        on_batch, done = (None, lambda: None)
        if self._encode_progress is not None:
            on_batch, done = self._encode_progress(corpus.n_texts, f"encode {trial.dataset} / {trial.model.name}")
        try:
            variants = pooled_variants(encoder, corpus.texts, missing, batch_size=trial.model.batch_size,
                                       counts=counts, ids=ids, on_batch=on_batch, long_texts=trial.model.long_texts)
        finally:
            done()
        self.work["forward_passes"] += 1
        seconds = time.perf_counter() - started
        self._logged("encode", seconds)
        for variant, array in variants.items():
            self._keep("pool", wanted[variant], array.astype(dtype, copy=False),
                       {"settings": {"layers": variant[0], "pooling": variant[1], "dtype": dtype}, "seconds": seconds})

    def _encode_without_transformer(self, trial: Trial, wanted: dict, missing: list) -> None:
        """Word-vector, TF-IDF or precomputed document vectors; lengths in words (these models have no subword
        tokenizer), or for precomputed vectors under the tokenizer the entry names."""
        from harness.embed.lexical import tfidf_svd
        from harness.embed.models import loaded_word_vectors
        from harness.embed.static_vectors import static_pooled, tokens

        encode = trial.stages["encode"]
        corpus = self.corpora[trial.dataset]
        texts = corpus.texts
        dtype = trial.stages["pool"].settings["dtype"]
        started = time.perf_counter()
        tokenizer = trial.resolved_model.length_tokenizer
        if tokenizer is None:
            counts = np.array([len(tokens(t)) for t in texts], dtype=np.int64)
        else:
            from harness.datasets.card import tokenizer_counter

            counts = tokenizer_counter(tokenizer.folder)(texts)
        info = {"settings": encode.settings, "truncated_fraction": 0.0}
        if trial.model.family == "precomputed":
            from harness.embed.precomputed import aligned_vectors, vectors_source

            vectors = aligned_vectors(vectors_source(trial.model), corpus.ids, corpus.name)
            outputs = {variant: vectors for variant in missing}
            info["truncated_fraction"] = None  # unknown: the vectors were made elsewhere
        elif trial.model.family == "static":
            words = self._memo(("words", str(trial.resolved_model.folder)),
                               lambda: loaded_word_vectors(trial.resolved_model))
            pooled, info["oov_fraction"] = static_pooled(
                words, texts, sorted({pooling for _, pooling in wanted}), sif_a=trial.model.sif_a,
                remove_first_component=trial.model.remove_first_component)
            outputs = {variant: pooled[variant[1]] for variant in missing}
        else:
            document_vectors = tfidf_svd(texts, dimensions=trial.model.dimensions, seed=0)
            outputs = {variant: document_vectors for variant in missing}
        seconds = time.perf_counter() - started
        self.work["forward_passes"] += 1
        self._logged("encode", seconds)
        if not self._held("encode", encode.key):
            self._keep("encode", encode.key, counts, {**info, "seconds": seconds})
        for variant, array in outputs.items():
            self._keep("pool", wanted[variant], array.astype(dtype, copy=False),
                       {"settings": {"layers": variant[0], "pooling": variant[1], "dtype": dtype}, "seconds": seconds})

    def encode_info(self, trial: Trial) -> dict:
        self.token_counts(trial)
        return self._info[trial.stages["encode"].key]

    def token_counts(self, trial: Trial) -> np.ndarray:
        key = trial.stages["encode"].key
        if not self._held("encode", key):
            self._encode(trial)
        return self._outputs[key]

    def long_text_info(self, trial: Trial) -> dict[str, float]:
        """truncated_fraction, and under chunk_mean windows_per_text_mean and split_fraction (see encode.long_text_info)."""
        info = self.encode_info(trial)
        names = ("truncated_fraction", "windows_per_text_mean", "split_fraction")
        return {name: float(info[name]) for name in names if name in info}

    def pooled(self, trial: Trial, own: bool = False) -> np.ndarray:
        """The pooled vectors the trial's chain is computed from; with ``own``, those of the trial's own pooling."""
        key = (trial.own_stages if own else trial.stages)["pool"].key
        if not self._held("pool", key):
            self._encode(trial)
        return np.asarray(self._outputs[key], dtype=np.float32)

    # -- downstream stages -------------------------------------------------------------------------------
    def holds(self, kind: str, key: str) -> bool:
        """Whether the output of this stage is in memory or in the cache."""
        return self._held(kind, key)

    def adopt(self, trial: Trial, kind: str, array: np.ndarray, seconds: float, counter: str) -> None:
        """Take a stage output computed elsewhere (a cluster worker) as if computed here."""
        stage = trial.stages[kind]
        if self._held(kind, stage.key):
            return
        self.work[counter] += 1
        self.work[f"{kind}_from_cluster"] += 1
        self._logged(kind, seconds)
        self._keep(kind, stage.key, array, {"settings": stage.settings, "seconds": seconds, "computed_on": "dask"})

    def wanted_pools(self, trial: Trial) -> dict:
        """Every (layers, pooling) variant any trial asks of this trial's encode key, with its pool key."""
        encode = trial.stages["encode"]
        dtype = trial.stages["pool"].settings["dtype"]
        return {variant: pool_stage(encode.key, *variant, dtype).key for variant in self._variants[encode.key]}

    def adopt_encoding(self, trial: Trial, counts: np.ndarray, long_text: dict, pooled: dict, seconds: float,
                       computed_on: str) -> None:
        """Take a forward pass computed elsewhere (chunks on a cluster, assembled in the texts' order): the token
        counts with what happened to long texts, and every pooled variant, as if computed here."""
        encode = trial.stages["encode"]
        dtype = trial.stages["pool"].settings["dtype"]
        wanted = self.wanted_pools(trial)
        self.work["forward_passes"] += 1
        self.work["encode_from_cluster"] += 1
        self._logged("encode", seconds)
        if not self._held("encode", encode.key):
            self._keep("encode", encode.key, counts, {"settings": encode.settings, **long_text, "seconds": seconds,
                                                      "computed_on": computed_on})
        for variant, array in pooled.items():
            if not self._held("pool", wanted[variant]):
                self._keep("pool", wanted[variant], array.astype(dtype, copy=False),
                           {"settings": {"layers": variant[0], "pooling": variant[1], "dtype": dtype},
                            "seconds": seconds, "computed_on": computed_on})

    def share_rows(self, trial: Trial, source: "StageExecutor", source_trial: Trial, rows: np.ndarray) -> None:
        """Take this trial's forward pass as ``rows`` of ``source_trial``'s on another corpus that holds this one's
        texts (a halving round's nested subsample): token counts and every pooled variant it wants, sliced, with
        no forward pass of its own. Only for transformer families on a float backend (ROW_INDEPENDENT_BACKENDS),
        whose vectors of a text do not depend on the other texts (up to the float rounding of a different batch,
        as for batch_size, see plan.RESULT_NEUTRAL); TF-IDF and static vectors are fitted or read per corpus, so
        they encode their own. Held in memory only, and the runner gives a round's executor no disk cache, so
        nothing computed from these rows is stored under the subsample's keys. A source whose forward pass raises
        is left alone, and the trial computes (and fails) as usual."""
        # int8 ONNX quantises activations with one scale per batch: a text's vector depends on its batch-mates
        # (measured: 7e-4 of the scale between a corpus's rows and the subsample's own pass), so it encodes its own.
        if trial.model.family not in TRANSFORMER_FAMILIES or trial.model.backend not in ROW_INDEPENDENT_BACKENDS:
            return
        encode = trial.stages["encode"]
        wanted = self.wanted_pools(trial)
        if self._held("encode", encode.key) and all(self._held("pool", key) for key in wanted.values()):
            return
        source_wanted = source.wanted_pools(source_trial)
        try:
            counts = source.token_counts(source_trial)
            measured = source.encode_info(source_trial)
            if "window_max_length" in measured:  # no model load where the whole corpus's pass is stored
                info = long_text_figures(counts[rows], measured["window_max_length"], measured["window_specials"],
                                         trial.model.long_texts)
            else:
                info = long_text_info(counts[rows], source._encoder(source_trial), trial.model.long_texts)
            pooled = {variant: source._pooled_variant(source_trial, source_wanted[variant]) for variant in wanted}
        except Exception:  # the trial's own stages raise it again, inside the trial
            return
        shared = "rows of the whole corpus's forward pass"
        self._outputs[encode.key] = counts[rows]
        self._info[encode.key] = {"settings": encode.settings, **info, "seconds": 0.0, "computed_on": shared}
        dtype = trial.stages["pool"].settings["dtype"]
        for variant, key in wanted.items():
            self._outputs[key] = pooled[variant][rows]
            self._info[key] = {"settings": {"layers": variant[0], "pooling": variant[1], "dtype": dtype},
                               "seconds": 0.0, "computed_on": shared}
        self.work["encodes_shared_from_full_corpus"] += 1

    def _pooled_variant(self, trial: Trial, key: str) -> np.ndarray:
        """One pooled variant of the trial's encode key, by its pool key (computing the forward pass if needed)."""
        if not self._held("pool", key):
            self._encode(trial)
        return self._outputs[key]

    def refuse(self, trial: Trial, kind: str, error: BaseException) -> None:
        """Record that computing this stage elsewhere (a cluster worker) raised ``error``: every trial that needs
        the stage then raises it, and fails as it would have here, without computing it again."""
        self._refused[trial.stages[kind].key] = error
        self.work[f"{kind}_failed_on_cluster"] += 1

    def _computed(self, trial: Trial, kind: str, counter: str, inputs: Callable[[], tuple],
                  compute: Callable[..., np.ndarray], stage=None, logged_as: Optional[str] = None) -> np.ndarray:
        """The stage's output; when computed, its inputs are fetched first so that only its own work is timed."""
        stage = stage or trial.stages[kind]
        if stage.key in self._refused:
            raise self._refused[stage.key].with_traceback(None)
        if not self._held(kind, stage.key):
            arguments = inputs()
            started = time.perf_counter()
            array = compute(*arguments)
            seconds = time.perf_counter() - started
            self.work[counter] += 1
            self._logged(logged_as or kind, seconds)
            self._keep(kind, stage.key, array, {"settings": stage.settings, "seconds": seconds})
        return self._outputs[stage.key]

    def transformed(self, trial: Trial, own: bool = False) -> np.ndarray:
        """The vectors the trial's reducer sees; with ``own``, the same chain applied to the trial's own pooling."""
        stage = (trial.own_stages if own else trial.stages)["transform"]
        return self._computed(trial, "transform", "transforms",
                              lambda: (self.pooled(trial, own), self.token_counts(trial)),
                              lambda pooled, counts: transformed(pooled, counts, trial.steps), stage=stage)

    def neighbour_graph(self, trial: Trial) -> np.ndarray:
        """The neighbour graph of a UMAP trial's vectors: once per (vectors, metric, n_neighbors), for every seed,
        n_components and min_dist that share it."""
        stage = trial.stages["graph"]
        return self._computed(trial, "graph", "neighbour_graphs", lambda: (self.transformed(trial),),
                              lambda vectors: neighbour_graph(vectors, stage.settings["metric"],
                                                              stage.settings["n_neighbors"], stage.settings["method"]),
                              stage=stage)

    def reduced(self, trial: Trial) -> np.ndarray:
        if "graph" in trial.stages:
            return self._computed(trial, "reduce", f"{trial.reducer.method}_fits",
                                  lambda: (self.transformed(trial), self.neighbour_graph(trial)),
                                  lambda vectors, graph: reduced(vectors, trial.reducer, trial.seed, graph))
        return self._computed(trial, "reduce", f"{trial.reducer.method}_fits", lambda: (self.transformed(trial),),
                              lambda vectors: reduced(vectors, trial.reducer, trial.seed))

    def map_coordinates(self, trial: Trial) -> np.ndarray:
        """The (n, 2) map of the vectors the trial's reducer sees (engine.winner_map.map_settings, MAP_SEED), as a
        graph stage and a reduce stage keyed exactly like a planned 2-D UMAP of those vectors: a sweep that fits
        that reduction shares it, and a rerun reads the map back from the cache instead of fitting it again."""
        from harness.engine.plan import graph_stage
        from harness.engine.winner_map import MAP_SEED, map_settings

        n_texts = self.corpora[trial.dataset].n_texts
        settings = map_settings(n_texts)
        graph = graph_stage(trial.stages["transform"].key, settings, n_texts)
        fit = make_stage("reduce", graph.key, {**settings.as_params(), "seed": MAP_SEED})
        # Logged as "map" (not graph or reduce): the plan and its estimate count the sweep's own stages only.
        neighbours = self._computed(trial, "graph", "map_graphs", lambda: (self.transformed(trial),),
                                    lambda vectors: neighbour_graph(vectors, graph.settings["metric"],
                                                                    graph.settings["n_neighbors"],
                                                                    graph.settings["method"]), stage=graph, logged_as="map")
        return self._computed(trial, "reduce", "map_fits", lambda: (self.transformed(trial), neighbours),
                              lambda vectors, found: reduced(vectors, settings, MAP_SEED, found), stage=fit,
                              logged_as="map")

    def clustered(self, trial: Trial) -> np.ndarray:
        n_classes = self.corpora[trial.dataset].n_classes
        return self._computed(trial, "cluster", "clusterings", lambda: (self.reduced(trial),),
                              lambda vectors: cluster_labels(vectors, trial.clusterer, trial.seed, n_classes))

    def label_free_score(self, trial: Trial, name: str, clusters: np.ndarray, *, max_points: int) -> float:
        """Silhouette (on the trial's own pooled vectors) or DBCV (on its clustered space), once per distinct labelling.

        Keyed like a stage: the vectors' stage key, a digest of the labels and the settings, with the trial's seed
        only where the score subsamples (more than ``max_points`` points), the one case where it enters. Seeds of a
        seed-free clustering share their labels, so they share the score.
        """
        from harness import __version__
        from harness.engine.plan import SCORES_VERSION
        from harness.score.scoring import VECTOR_SCORES, VECTOR_SCORES_VERSION, subsampled_points

        vectors_stage = trial.own_stages["pool"] if name == "silhouette" else trial.stages["reduce"]
        vectors = (lambda: self.pooled(trial, own=True)) if name == "silhouette" else (lambda: self.reduced(trial))
        subsampled = subsampled_points(name, clusters) > max_points
        stage = make_stage("score", vectors_stage.key, {
            "score": name, "labels": array_digest(np.asarray(clusters, dtype=np.int64)), "max_points": max_points,
            "sample_seed": trial.seed if subsampled else None,
            "code": {"harness": __version__, "vector_scores": VECTOR_SCORES_VERSION, "scores": SCORES_VERSION}})
        from harness.metrics._internal import DISTANCES_KEPT_UP_TO

        compute = VECTOR_SCORES[name]
        held = name == "silhouette" and clusters.size <= DISTANCES_KEPT_UP_TO  # the distances of all the vectors
        value = self._computed(trial, "score", f"{name}_computations", lambda: (vectors(),),
                               lambda points: np.array([compute(
                                   points, clusters, max_points=max_points, seed=trial.seed,
                                   **({"distances": self._cosine_distances(vectors_stage.key, points)} if held else {}))]),
                               stage=stage)
        return float(value[0])

    def _cosine_distances(self, key: str, points: np.ndarray) -> np.ndarray:
        """All cosine distances of one set of pooled vectors, kept for the next labellings of the same vectors (the
        trials of a configuration, and the configurations sharing a pooling, follow each other)."""
        from harness.metrics._internal import cosine_distances

        if self._distances is None or self._distances[0] != key:
            self._distances = None  # release the former matrix before computing the next
            self._distances = (key, cosine_distances(points))
        return self._distances[1]

    def _memo(self, key: tuple, compute: Callable[[], Any]) -> Any:
        if key not in self._derived:
            self._derived[key] = compute()
        return self._derived[key]

    def term_counts(self, trial: Trial):
        """Unigram and bigram counts of the trial's corpus, built once per dataset."""
        from harness.score.describe import term_counts

        return self._memo(("terms", trial.dataset), lambda: term_counts(self.corpora[trial.dataset].texts))

    def length_leakage(self, trial: Trial, kind: str = "transform", seed: int = 0) -> float:
        """Cross-validated R^2 of log length from the trial's own vectors: after its transform (the vectors that are
        reduced) or, with ``kind="pool"``, as pooled. Once per stage key, and cached like a stage (it depends on the
        vectors and, through their chain, on the token counts, and on the folds, penalties and seed in its key; not on
        any clustering), so a rerun that changes only clusterings reads it back. (On Dask, distributed_scores
        computes it on the workers and does not use this cache.)"""
        from harness import __version__
        from harness.engine.plan import SCORES_VERSION
        from harness.metrics import length_leakage_r2
        from harness.metrics._length import LEAKAGE_ALPHAS, LEAKAGE_FOLDS

        if kind == "transform" and not trial.steps:
            kind = "pool"  # an empty chain hands the reducer the pooled vectors themselves: the same figure
        vectors = self.transformed if kind == "transform" else self.pooled
        stage = make_stage("score", trial.own_stages[kind].key, {
            "score": "length_leakage_r2", "seed": seed, "folds": LEAKAGE_FOLDS, "alphas": list(LEAKAGE_ALPHAS),
            "code": {"harness": __version__, "scores": SCORES_VERSION}})
        value = self._computed(trial, "score", "leakage_computations",
                               lambda: (vectors(trial, own=True), self.token_counts(trial)),
                               lambda points, counts: np.array([length_leakage_r2(points, np.maximum(counts, 1), seed=seed)]),
                               stage=stage)
        return float(value[0])

    def stage_seconds(self, trial: Trial) -> dict[str, float]:
        """Seconds each of the trial's stages took when it was computed (shared or cached stages count in full)."""
        seconds = lambda kind: float(self._info.get(trial.stages[kind].key, {}).get("seconds", 0.0))  # noqa: E731
        return {
            "encode_seconds": seconds("pool"),
            "reduce_seconds": seconds("transform") + seconds("reduce")
            + (float(self._info.get(trial.stages["graph"].key, {}).get("seconds", 0.0)) if "graph" in trial.stages else 0.0),
            "cluster_seconds": seconds("cluster"),
        }
