"""A synthetic corpus of requests sent to a fictional town's services.

Built to expose length-driven clustering: text length is drawn independently
of the topic unless ``length_topic_tie`` asks otherwise, and the strength of
the topic signal is a knob (``topic_share``, ``topic_overlap``). At a strong
topic signal every setup clusters by topic and length has nothing to show, so
the default is deliberately weak.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, PositiveInt, model_validator

from harness._settings import Settings
from harness.datasets.corpus import Corpus

TOPIC_WORDS: dict[str, tuple[str, ...]] = {
    "roads": (
        "pothole", "asphalt", "tarmac", "kerb", "resurfacing", "crack", "roadworks", "lane", "junction",
        "speed", "bump", "gravel", "cones", "detour", "carriageway", "verge", "gritting", "ice", "salt",
        "tyre", "puncture", "subsidence", "roundabout", "crossing", "pavement", "drain", "manhole",
    ),
    "lighting": (
        "streetlight", "lamppost", "bulb", "flickering", "dark", "lantern", "lamp", "unlit", "wiring",
        "glare", "floodlight", "illumination", "dim", "outage", "fuse", "column", "sodium", "led",
        "bright", "shadowy", "nighttime", "timer", "sensor", "beam", "switched", "buzzing", "cable",
    ),
    "waste": (
        "bin", "rubbish", "recycling", "collection", "litter", "landfill", "compost", "wheelie", "bag",
        "fly-tipping", "dumped", "mattress", "refuse", "skip", "glass", "cardboard", "overflowing",
        "missed", "foxes", "seagulls", "stink", "lorry", "sack", "container", "waste", "garbage", "tip",
    ),
    "parks": (
        "playground", "swing", "bench", "grass", "mowing", "hedge", "tree", "branch", "pond", "ducks",
        "footpath", "gate", "picnic", "bandstand", "flowerbed", "weeds", "slide", "football", "pitch",
        "dogs", "fouling", "gardener", "allotment", "meadow", "leaves", "bark", "shrubs",
    ),
    "water": (
        "leak", "burst", "pipe", "pressure", "tap", "flooding", "sewer", "hydrant", "puddle", "meter",
        "discoloured", "brown", "mains", "valve", "stopcock", "gushing", "drainage", "gully", "blocked",
        "overflow", "supply", "plumbing", "damp", "trickle", "reservoir", "boil", "chlorine",
    ),
    "noise": (
        "loud", "music", "party", "barking", "shouting", "bass", "alarm", "drilling", "construction",
        "neighbours", "karaoke", "engine", "revving", "amplifier", "banging", "fireworks", "speakers",
        "racket", "decibels", "generator", "nightclub", "disturbance", "howling", "hammering", "din",
        "horn", "stereo",
    ),
    "buses": (
        "bus", "timetable", "shelter", "driver", "route", "fare", "stop", "late", "cancelled", "ticket",
        "depot", "passenger", "coach", "diversion", "schedule", "pass", "queue", "interchange", "tram",
        "platform", "ramp", "wheelchair", "conductor", "terminus", "service", "delay", "crowded",
    ),
    "permits": (
        "permit", "licence", "application", "planning", "extension", "scaffolding", "parking", "resident",
        "visitor", "approval", "form", "fee", "renewal", "inspection", "certificate", "deadline",
        "consent", "zone", "objection", "hearing", "paperwork", "registration", "stamp", "expiry",
        "refund", "appeal", "clerk",
    ),
}

FILLER_WORDS: tuple[str, ...] = (
    "the", "a", "our", "my", "this", "that", "there", "is", "was", "has", "been", "again", "still",
    "please", "could", "someone", "look", "at", "it", "near", "outside", "behind", "by", "on", "in",
    "of", "for", "and", "but", "since", "last", "week", "month", "yesterday", "today", "every",
    "morning", "evening", "street", "road", "house", "number", "corner", "school", "shop", "church",
    "we", "they", "I", "have", "reported", "before", "nobody", "came", "very", "really", "problem",
    "issue", "thanks", "urgent", "soon", "many", "people", "children", "elderly", "residents",
    "avenue", "close", "lane", "hill", "park", "square", "opposite", "next", "to", "about", "days",
)

TOPIC_NAMES: tuple[str, ...] = tuple(TOPIC_WORDS)


class SyntheticSource(Settings):
    source: Literal["synthetic"]
    name: str = "town_requests"
    n_texts: PositiveInt = 1200
    n_topics: int = Field(6, ge=2, le=len(TOPIC_NAMES))
    topic_share: float = Field(0.15, gt=0.0, le=1.0)
    topic_overlap: float = Field(0.0, ge=0.0, lt=1.0)
    min_words: PositiveInt = 3
    max_words: PositiveInt = 60
    length_topic_tie: float = Field(0.0, ge=0.0, le=1.0)
    seed: int = 0

    @model_validator(mode="after")
    def _length_range(self) -> "SyntheticSource":
        if self.max_words < self.min_words:
            raise ValueError(f"max_words={self.max_words} is below min_words={self.min_words}")
        return self


def word_counts(topics: np.ndarray, spec: SyntheticSource, rng: np.random.Generator) -> np.ndarray:
    """Words per text: uniform over the range, or, with probability length_topic_tie, within the topic's own band."""
    independent = rng.integers(spec.min_words, spec.max_words + 1, size=topics.size)
    edges = np.linspace(spec.min_words, spec.max_words + 1, spec.n_topics + 1).astype(int)
    low, high = edges[topics], np.maximum(edges[topics + 1], edges[topics] + 1)
    banded = rng.integers(low, high)
    tied = rng.random(topics.size) < spec.length_topic_tie
    return np.where(tied, banded, independent)


def synthetic_corpus(spec: SyntheticSource) -> Corpus:
    """The town-requests corpus for these settings; identical for identical settings."""
    rng = np.random.default_rng(spec.seed)
    topics = rng.permutation(np.arange(spec.n_texts) % spec.n_topics)
    counts = word_counts(topics, spec, rng)
    vocabularies = [TOPIC_WORDS[name] for name in TOPIC_NAMES[: spec.n_topics]]
    texts = []
    for topic, count in zip(topics, counts):
        is_topic_word = rng.random(count) < spec.topic_share
        borrowed = rng.random(count) < spec.topic_overlap
        donors = np.where(borrowed, rng.integers(spec.n_topics, size=count), topic)
        words = [
            vocabularies[donor][rng.integers(len(vocabularies[donor]))] if topical
            else FILLER_WORDS[rng.integers(len(FILLER_WORDS))]
            for topical, donor in zip(is_topic_word, donors)
        ]
        texts.append(" ".join(words).capitalize() + ".")
    return Corpus(
        name=spec.name,
        texts=texts,
        ids=np.array([f"req-{i:06d}" for i in range(spec.n_texts)]),
        labels=topics.astype(np.int64),
        label_names=TOPIC_NAMES[: spec.n_topics],
        source="synthetic",
    )
