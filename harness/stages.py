"""Computing a trial's stages, each once per key.

The executor holds the outputs of the stages it has computed in this process,
loads each model once, and runs one forward pass per encode key that yields every
pooling x layer variant any trial asks of it. Counters record the work done, so
tests can check what was (not) recomputed without timing anything.
"""

from __future__ import annotations

import time
from collections import Counter, defaultdict
from typing import Callable, Optional

import numpy as np

from harness.cluster import cluster_labels
from harness.datasets import Corpus
from harness.encode import pooled_variants, token_counts, truncated_fraction
from harness.models import LoadedEncoder, loaded_encoder
from harness.plan import Trial, pool_stage
from harness.reduce import reduced
from harness.transforms import NORMALIZATIONS


class StageExecutor:
    def __init__(self, corpora: dict[str, Corpus], trials: list[Trial], on_encode_batch: Optional[Callable[[int], None]] = None):
        self.corpora = corpora
        self.outputs: dict[str, np.ndarray] = {}
        self.seconds: dict[str, float] = {}
        self.work = Counter()
        self._encoders: dict[tuple, LoadedEncoder] = {}
        self._variants: dict[str, set] = defaultdict(set)
        self._truncated: dict[str, float] = {}
        self._on_encode_batch = on_encode_batch
        for trial in trials:
            self._variants[trial.stages["encode"].key].add((trial.layers, trial.pooling))

    def _encoder(self, trial: Trial) -> LoadedEncoder:
        spec = trial.model
        cache_key = (trial.resolved_model.folder, spec.max_length, spec.trust_remote_code)
        if cache_key not in self._encoders:
            self._encoders[cache_key] = loaded_encoder(trial.resolved_model, spec.max_length, spec.trust_remote_code)
        return self._encoders[cache_key]

    def _encode(self, trial: Trial) -> None:
        """One forward pass producing every variant of this encode key that is not already held."""
        encode = trial.stages["encode"]
        corpus = self.corpora[trial.dataset]
        encoder = self._encoder(trial)
        started = time.perf_counter()
        counts = token_counts(encoder, corpus.texts)
        pool_keys = {
            (t_layers, t_pooling): pool_stage(encode.key, t_layers, t_pooling).key
            for t_layers, t_pooling in self._variants[encode.key]
        }
        missing = [variant for variant, key in pool_keys.items() if key not in self.outputs]
        variants = pooled_variants(encoder, corpus.texts, missing, batch_size=trial.model.batch_size, counts=counts, on_batch=self._on_encode_batch)
        self.work["forward_passes"] += 1
        elapsed = time.perf_counter() - started
        for variant, array in variants.items():
            self.outputs[pool_keys[variant]] = array
            self.seconds[pool_keys[variant]] = elapsed
        self.outputs[encode.key] = counts
        self.seconds[encode.key] = elapsed
        self._truncated[encode.key] = truncated_fraction(counts, encoder)

    def token_counts(self, trial: Trial) -> np.ndarray:
        key = trial.stages["encode"].key
        if key not in self.outputs:
            self._encode(trial)
        return self.outputs[key]

    def truncated_fraction(self, trial: Trial) -> float:
        self.token_counts(trial)
        return self._truncated[trial.stages["encode"].key]

    def pooled(self, trial: Trial) -> np.ndarray:
        key = trial.stages["pool"].key
        if key not in self.outputs:
            self._encode(trial)
        return self.outputs[key]

    def _computed(self, key: str, kind: str, compute: Callable[[], np.ndarray]) -> np.ndarray:
        if key not in self.outputs:
            started = time.perf_counter()
            self.outputs[key] = compute()
            self.seconds[key] = time.perf_counter() - started
            self.work[kind] += 1
        return self.outputs[key]

    def transformed(self, trial: Trial) -> np.ndarray:
        return self._computed(
            trial.stages["transform"].key, "transforms",
            lambda: NORMALIZATIONS[trial.normalize](self.pooled(trial)),
        )

    def reduced(self, trial: Trial) -> np.ndarray:
        return self._computed(
            trial.stages["reduce"].key, f"{trial.reducer.method}_fits",
            lambda: reduced(self.transformed(trial), trial.reducer, trial.seed),
        )

    def clustered(self, trial: Trial) -> np.ndarray:
        corpus = self.corpora[trial.dataset]
        return self._computed(
            trial.stages["cluster"].key, "clusterings",
            lambda: cluster_labels(self.reduced(trial), trial.clusterer, trial.seed, corpus.n_classes),
        )

    def stage_seconds(self, trial: Trial) -> dict[str, float]:
        """Seconds each of the trial's stages took when computed (shared stages count in full)."""
        return {
            "encode_seconds": self.seconds.get(trial.stages["pool"].key, 0.0),
            "reduce_seconds": self.seconds.get(trial.stages["reduce"].key, 0.0),
            "cluster_seconds": self.seconds.get(trial.stages["cluster"].key, 0.0),
        }
