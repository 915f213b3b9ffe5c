"""A verdict across datasets: which configuration ranks best over several corpora, and is the difference real?

The procedure is Demšar's (JMLR 7, 2006, section 3.2.2) for comparing methods over several data sets:
rank the configurations on each dataset by a score (higher is better; ties share the average rank),
average the ranks over datasets, test whether the average ranks differ (Friedman's chi-square and the
Iman-Davenport F form of it), then say which pairs differ: the Nemenyi critical difference for all pairs
and Holm-corrected z tests against the best. Datasets play the part of independent samples, so the test
speaks about corpora like these, and with fewer than about 5 of them it has little power to find anything.
Optionally two finalists get a Bayesian signed-rank comparison with a region of practical equivalence
(Benavoli et al., JMLR 18, 2017), which can say "practically equivalent" where the tests can only say "not
different"; it needs the optional package ``baycomp``.

Pure: arrays, mappings and numbers in, frozen results out; scipy and baycomp are imported when used.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Literal, Mapping, Optional, Sequence

import numpy as np

from harness.errors import DataError, HarnessError

DEFAULT_ALPHA = 0.05
# Below this many datasets the Friedman test rarely rejects even when ranks differ: a rule of thumb of the
# trade (common practice; the issue asks for "at least about 5"), not a threshold from the paper.
FEW_DATASETS = 5
# Posterior probability above which the Bayesian comparison states a conclusion: Benavoli et al. (2017)
# decide at 0.95 in their examples; common practice, not a law.
BAYES_DECISION = 0.95

Missing = Literal["refuse", "common"]


# --- the table of scores ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class ScoreTable:
    """Scores of configurations (columns) on datasets (rows), every cell finite; higher is better."""

    datasets: tuple[str, ...]
    configurations: tuple[str, ...]
    scores: np.ndarray  # shape (len(datasets), len(configurations))
    # configurations left out because they lack a finite score somewhere: (configuration, datasets lacking it)
    left_out: tuple[tuple[str, tuple[str, ...]], ...] = ()


def score_table(scores: Mapping[str, Mapping[str, float]], *, missing: Missing = "common") -> ScoreTable:
    """The table of ``scores[dataset][configuration]``, datasets and configurations in order of appearance.

    A configuration without a finite score on some dataset (absent, None or NaN) cannot be ranked there.
    ``missing="common"`` leaves it out and records it in ``left_out``; ``missing="refuse"`` raises.
    """
    if missing not in ("refuse", "common"):
        raise ValueError(f"The 'missing' parameter of score_table must be 'refuse' or 'common'. Got {missing!r} instead.")
    datasets = tuple(scores)
    configurations: list[str] = []
    for per_configuration in scores.values():
        configurations.extend(c for c in per_configuration if c not in configurations)
    lacking: dict[str, list[str]] = {}
    for dataset in datasets:
        for configuration in configurations:
            value = scores[dataset].get(configuration)
            if value is None or not math.isfinite(float(value)):
                lacking.setdefault(configuration, []).append(dataset)
    if lacking and missing == "refuse":
        configuration, where = next(iter(lacking.items()))
        others = f" (and {len(lacking) - 1} more configuration(s))" if len(lacking) > 1 else ""
        raise DataError(f"configuration {configuration!r} has no score on dataset(s) {', '.join(where)}{others}; "
                        "the across-datasets verdict needs a finite score for every configuration on every dataset")
    kept = tuple(c for c in configurations if c not in lacking)
    matrix = np.array([[float(scores[d][c]) for c in kept] for d in datasets], dtype=float).reshape(len(datasets), len(kept))
    return ScoreTable(datasets, kept, matrix, tuple((c, tuple(w)) for c, w in lacking.items()))


def ranks_per_dataset(scores: np.ndarray) -> np.ndarray:
    """Rank of each configuration on each dataset (row): 1 for the highest score, ties share the average rank."""
    from scipy.stats import rankdata

    scores = _matrix(scores, "scores")
    return rankdata(-scores, axis=1, method="average")


def _matrix(values: np.ndarray, name: str) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    if values.ndim != 2:
        raise ValueError(f"The '{name}' parameter must be 2-D (datasets x configurations). Got shape {values.shape} instead.")
    if not np.isfinite(values).all():
        raise ValueError(f"The '{name}' parameter must be finite everywhere. Got {int((~np.isfinite(values)).sum())} non-finite cell(s) instead.")
    return values


# --- the omnibus test ------------------------------------------------------------------------------------

@dataclass(frozen=True)
class FriedmanTest:
    """Friedman's test that all configurations have the same average rank, in its chi-square and F forms."""

    n_datasets: int
    n_configurations: int
    chi2: float
    chi2_df: int
    chi2_p_value: float
    f: float  # Iman and Davenport's F_F
    f_df: tuple[int, int]
    f_p_value: float
    tie_corrected: bool  # the ranks had ties and chi2 was corrected for them
    unanimous: bool = False  # every dataset ranks the configurations the same way (F_F is infinite)


def friedman_test(ranks: np.ndarray, *, correct_ties: bool = True) -> FriedmanTest:
    """Friedman's chi-square over a (datasets x configurations) rank matrix, and Iman-Davenport's F.

    Demšar (2006), section 3.2.2: chi2_F = 12N / (k(k+1)) * [sum_j R_j^2 - k(k+1)^2 / 4] over the average
    ranks R_j, and F_F = (N-1) chi2_F / (N(k-1) - chi2_F) on (k-1, (k-1)(N-1)) degrees of freedom. With
    ``correct_ties`` chi2_F is divided by the usual tie correction (1 - sum(t^3 - t) / (N k (k^2 - 1)), as
    scipy.stats.friedmanchisquare does), which makes F_F the F of an analysis of variance of the ranks
    (Conover, Practical Nonparametric Statistics, 3rd ed., 1999, section 5.8); without ties both forms agree.
    The paper's worked example uses the uncorrected form.

    When every dataset ranks the configurations the same way, chi2_F reaches its ceiling N(k-1) and F_F is
    infinite, where the F approximation's p-value of 0 would overstate a few datasets' agreement. Its p-value
    is then the exact chance of that agreement when each dataset's ranks are an arbitrary arrangement of its
    tie pattern: (prod_t t! / k!)^(N-1) over the tie groups t of the common ranking, (1/k!)^(N-1) without ties.
    """
    from scipy import stats

    ranks = _matrix(ranks, "ranks")
    n, k = ranks.shape
    if k < 2:
        raise DataError(f"the across-datasets verdict needs at least 2 configurations; got {k}")
    if n < 2:
        raise DataError(f"the across-datasets verdict needs at least 2 datasets; got {n}")
    if not np.allclose(ranks.sum(axis=1), k * (k + 1) / 2.0) or ranks.min() < 1 or ranks.max() > k:
        raise ValueError("The 'ranks' parameter must hold one ranking per row (values 1..k summing to k(k+1)/2). "
                         f"Got row sums {np.unique(ranks.sum(axis=1))} for k = {k} instead.")
    average = ranks.mean(axis=0)
    chi2 = 12.0 * n / (k * (k + 1)) * (float(np.sum(average**2)) - k * (k + 1) ** 2 / 4.0)
    # the observed spread of the ranks over their spread without ties: the same factor as 1 - sum(t^3 - t) / ...
    untied = n * k * (k * k - 1) / 12.0
    observed = float(np.sum(ranks**2)) - n * k * (k + 1) ** 2 / 4.0
    corrected = correct_ties and observed < untied * (1.0 - 1e-12)
    if corrected:
        chi2 = 0.0 if observed <= 1e-12 * untied else chi2 * untied / observed
    chi2 = max(chi2, 0.0)
    chi2_p = float(stats.chi2.sf(chi2, k - 1))
    ceiling = n * (k - 1.0)  # chi2_F when every dataset ranks the configurations the same way
    df = (k - 1, (k - 1) * (n - 1))
    unanimous = ceiling - chi2 <= 1e-12 * ceiling
    if unanimous:
        _, ties = np.unique(ranks[0], return_counts=True)
        arrangements = math.factorial(k) / math.prod(math.factorial(int(t)) for t in ties)
        f, f_p = math.inf, float(arrangements ** -(n - 1))
    else:
        f = (n - 1) * chi2 / (ceiling - chi2)
        f_p = float(stats.f.sf(f, *df))
    return FriedmanTest(n, k, float(chi2), k - 1, chi2_p, float(f), df, f_p, corrected, unanimous)


# --- post-hoc: all pairs (Nemenyi) and against one configuration (Holm) ---------------------------------

def rank_standard_error(k: int, n: int) -> float:
    """sqrt(k(k+1) / (6N)): the standard error of a difference of two average ranks (Demšar 2006, 3.2.2)."""
    return math.sqrt(k * (k + 1) / (6.0 * n))


@lru_cache(maxsize=256)
def nemenyi_critical_value(k: int, alpha: float = DEFAULT_ALPHA) -> float:
    """q_alpha of the two-tailed Nemenyi test for k configurations: the studentized range quantile for k
    means and infinite degrees of freedom, divided by sqrt(2) (Demšar 2006, Table 5(a))."""
    from scipy.stats import studentized_range

    if int(k) != k or k < 2:
        raise ValueError(f"The 'k' parameter of nemenyi_critical_value must be an integer >= 2. Got {k!r} instead.")
    _check_alpha(alpha)
    return float(studentized_range.ppf(1.0 - alpha, int(k), np.inf) / math.sqrt(2.0))


def critical_difference(k: int, n: int, alpha: float = DEFAULT_ALPHA) -> float:
    """Nemenyi's CD = q_alpha * sqrt(k(k+1) / (6N)): two average ranks at least this far apart differ."""
    return nemenyi_critical_value(k, alpha) * rank_standard_error(k, n)


def nemenyi_p_values(average_ranks: np.ndarray, n: int) -> np.ndarray:
    """Pairwise Nemenyi p-values (k x k, ones on the diagonal): P(studentized range of k > |R_i - R_j| / SE * sqrt 2)."""
    from scipy.stats import studentized_range

    average_ranks = np.asarray(average_ranks, dtype=float)
    k = average_ranks.size
    q = np.abs(average_ranks[:, None] - average_ranks[None, :]) / rank_standard_error(k, n)
    # average ranks are multiples of 1/(2N), so the k^2 differences take few values: integrate once per value
    values, where = np.unique(np.round(q, 12), return_inverse=True)
    p = studentized_range.sf(values * math.sqrt(2.0), k, np.inf)[where].reshape(q.shape)
    np.fill_diagonal(p, 1.0)
    return np.clip(p, 0.0, 1.0)


def holm_adjusted(p_values: Sequence[float]) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979), in the input's order: the i-th smallest p becomes
    max over j <= i of min(1, (m - j + 1) p_(j)). A hypothesis is rejected at alpha when its adjusted p < alpha,
    the same decision as Demšar's step-down rule (compare p_(i) with alpha / (m - i + 1), stop at the first retained)."""
    p = np.asarray(p_values, dtype=float)
    if p.ndim != 1 or not np.all((p >= 0) & (p <= 1)):
        raise ValueError(f"The 'p_values' parameter of holm_adjusted must be a 1-D array of probabilities. Got {p!r} instead.")
    m = p.size
    order = np.argsort(p, kind="stable")
    stepped = np.maximum.accumulate(np.minimum(1.0, (m - np.arange(m)) * p[order]))
    adjusted = np.empty(m)
    adjusted[order] = stepped
    return adjusted


@dataclass(frozen=True)
class Comparison:
    """One configuration against the control (the best, unless chosen): z on average ranks, two-sided p, Holm."""

    configuration: str
    average_rank: float
    z: float  # (R_configuration - R_control) / SE: positive when the configuration ranks worse
    p_value: float
    p_holm: float
    significant: bool


def comparisons_with_control(average_ranks: Mapping[str, float], n: int, control: str,
                             alpha: float = DEFAULT_ALPHA) -> tuple[Comparison, ...]:
    """Every other configuration against ``control``: z = (R_i - R_control) / sqrt(k(k+1)/(6N)), two-sided
    normal p, Holm-corrected over the k-1 comparisons (Demšar 2006, section 3.2.2). Ordered by p."""
    from scipy.stats import norm

    _check_alpha(alpha)
    if control not in average_ranks:
        raise ValueError(f"The 'control' parameter must be one of the configurations. Got {control!r} instead.")
    se = rank_standard_error(len(average_ranks), n)
    others = [c for c in average_ranks if c != control]
    z = np.array([(average_ranks[c] - average_ranks[control]) / se for c in others])
    p = 2.0 * norm.sf(np.abs(z))
    adjusted = holm_adjusted(p)
    rows = [Comparison(c, float(average_ranks[c]), float(zi), float(pi), float(ai), bool(ai < alpha))
            for c, zi, pi, ai in zip(others, z, p, adjusted)]
    return tuple(sorted(rows, key=lambda r: (r.p_value, r.configuration)))


@dataclass(frozen=True)
class PairDecision:
    """Two configurations under Nemenyi's test: the better-ranked first."""

    better: str
    worse: str
    rank_difference: float
    p_value: float
    significant: bool  # rank_difference >= the critical difference


def nemenyi_pairs(average_ranks: Mapping[str, float], n: int, alpha: float = DEFAULT_ALPHA) -> tuple[PairDecision, ...]:
    """All k(k-1)/2 pairs, best-ranked pairs first; significant when the ranks differ by at least CD."""
    names = _by_rank(average_ranks)
    ranks = np.array([average_ranks[c] for c in names])
    cd = critical_difference(len(names), n, alpha)
    p = nemenyi_p_values(ranks, n)
    return tuple(
        PairDecision(names[i], names[j], float(ranks[j] - ranks[i]), float(p[i, j]), bool(ranks[j] - ranks[i] >= cd))
        for i in range(len(names)) for j in range(i + 1, len(names))
    )


def non_significant_groups(average_ranks: Mapping[str, float], cd: float) -> tuple[tuple[str, ...], ...]:
    """The maximal groups of two or more configurations whose average ranks are all within ``cd`` of each
    other: the bars of a critical-difference diagram. On a line, such groups are runs of consecutive ranks."""
    names = _by_rank(average_ranks)
    groups: list[tuple[str, ...]] = []
    last_end = -1
    for start in range(len(names)):
        end = start
        while end + 1 < len(names) and average_ranks[names[end + 1]] - average_ranks[names[start]] < cd:
            end += 1
        if end > start and end > last_end:  # a run that ends where an earlier one ended lies inside it
            groups.append(tuple(names[start:end + 1]))
            last_end = end
    return tuple(groups)


def _by_rank(average_ranks: Mapping[str, float]) -> list[str]:
    return sorted(average_ranks, key=lambda c: (average_ranks[c], c))


def _check_alpha(alpha: float) -> None:
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"The 'alpha' parameter must lie in (0, 1). Got {alpha!r} instead.")


# --- Bayesian comparison of two finalists ----------------------------------------------------------------

@dataclass(frozen=True)
class BayesianComparison:
    """Posterior probabilities, from the Bayesian signed-rank test, that ``first`` scores higher than
    ``second`` by more than the rope, that they are within the rope of each other, or that ``second`` scores higher."""

    first: str
    second: str
    rope: float
    p_first_better: float
    p_equivalent: float
    p_second_better: float
    n_datasets: int
    samples: int
    seed: int

    @property
    def conclusion(self) -> str:
        if self.p_equivalent > BAYES_DECISION:
            return "practically equivalent"
        if self.p_first_better > BAYES_DECISION:
            return f"{self.first} is better"
        if self.p_second_better > BAYES_DECISION:
            return f"{self.second} is better"
        return "no conclusion"

    def sentence(self) -> str:
        return (f"Bayesian signed-rank test (Benavoli et al. 2017), rope ±{self.rope:g}: "
                f"P({self.first} better) = {self.p_first_better:.3f}, P(practically equivalent) = {self.p_equivalent:.3f}, "
                f"P({self.second} better) = {self.p_second_better:.3f}; {self.conclusion} "
                f"(decision at {BAYES_DECISION:g}; {self.n_datasets} datasets, {self.samples} posterior samples, seed {self.seed}).")


def bayesian_comparison(first: str, first_scores: Sequence[float], second: str, second_scores: Sequence[float], *,
                        rope: float, samples: int = 50_000, seed: int = 0) -> BayesianComparison:
    """The Bayesian signed-rank test of ``baycomp`` (Benavoli et al., JMLR 18, 2017) on per-dataset scores."""
    try:
        from baycomp import SignedRankTest
    except ImportError as missing:
        raise HarnessError("the Bayesian comparison needs the optional package baycomp; "
                           "install it with: pip install 'harness[bayes]'") from missing
    x = np.asarray(first_scores, dtype=float)
    y = np.asarray(second_scores, dtype=float)
    if x.ndim != 1 or x.shape != y.shape or x.size < 2 or not (np.isfinite(x).all() and np.isfinite(y).all()):
        raise ValueError("The 'first_scores' and 'second_scores' parameters must be finite 1-D arrays of one length >= 2. "
                         f"Got shapes {x.shape} and {y.shape} instead.")
    if not rope > 0:
        raise ValueError(f"The 'rope' parameter must be > 0. Got {rope!r} instead.")
    # baycomp takes differences y - x: "left" is x (first) ahead by more than the rope
    left, within, right = SignedRankTest.probs(x, y, rope, nsamples=samples, random_state=seed)
    return BayesianComparison(first, second, float(rope), float(left), float(within), float(right), int(x.size),
                              int(samples), int(seed))


# --- the verdict -----------------------------------------------------------------------------------------

@dataclass(frozen=True)
class AcrossVerdict:
    """Everything the across-datasets procedure found, and its account in words."""

    metric: str
    alpha: float
    table: ScoreTable
    ranks: np.ndarray  # (datasets x configurations), 1 = best
    average_ranks: dict[str, float]  # best first
    friedman: FriedmanTest
    q_alpha: float
    critical_difference: float
    pairs: tuple[PairDecision, ...]  # Nemenyi, all pairs
    against_best: tuple[Comparison, ...]  # Holm, every other configuration against the best
    groups: tuple[tuple[str, ...], ...]  # maximal groups not significantly different (Nemenyi)
    bayesian: Optional[BayesianComparison] = None

    @property
    def best(self) -> str:
        """The configuration with the best (lowest) average rank; ties go to the first name in sort order."""
        return next(iter(self.average_ranks))

    @property
    def sharing_best_rank(self) -> tuple[str, ...]:
        top = self.average_ranks[self.best]
        return tuple(c for c, r in self.average_ranks.items() if math.isclose(r, top, abs_tol=1e-12))

    @property
    def differences_found(self) -> bool:
        """The Friedman test (F form) rejects equal average ranks at alpha."""
        return self.friedman.f_p_value < self.alpha

    @property
    def not_different_from_best(self) -> tuple[str, ...]:
        return tuple(c.configuration for c in self.against_best if not c.significant)

    @property
    def winner(self) -> Optional[str]:
        """The best configuration when the evidence singles it out: the Friedman test rejects and the Holm
        comparisons find it better than every other configuration. None otherwise."""
        if self.differences_found and not self.not_different_from_best and len(self.sharing_best_rank) == 1:
            return self.best
        return None

    @property
    def not_significant_pairs(self) -> tuple[tuple[str, str], ...]:
        return tuple((p.better, p.worse) for p in self.pairs if not p.significant)

    def test_sentence(self) -> str:
        f = self.friedman
        if f.unanimous:
            f_form = (f"Iman-Davenport F({f.f_df[0]}, {f.f_df[1]}) is infinite: every dataset ranks the configurations "
                      f"the same way (its exact chance under equal ranks: {_p(f.f_p_value)})")
        else:
            f_form = f"Iman-Davenport F({f.f_df[0]}, {f.f_df[1]}) = {f.f:.2f} ({_p(f.f_p_value)})"
        return (f"Friedman test over {f.n_datasets} datasets and {f.n_configurations} configurations: "
                f"chi2_F({f.chi2_df}) = {f.chi2:.2f} ({_p(f.chi2_p_value)}); {f_form}"
                f"{'; ranks tie-corrected' if f.tie_corrected else ''}.")

    def headline(self) -> str:
        n, k = self.friedman.n_datasets, self.friedman.n_configurations
        standing = f"average rank {self.average_ranks[self.best]:.2f} among {k} configurations over {n} datasets, by {self.metric}"
        if self.winner is not None:
            worst_p = max(c.p_holm for c in self.against_best)
            return (f"{self.winner} wins across datasets ({standing}): the Friedman test finds differences "
                    f"({_p(self.friedman.f_p_value)}) and Holm-corrected comparisons find it better than every other "
                    f"configuration (largest adjusted {_p(worst_p)}; alpha = {self.alpha:g}).")
        if not self.differences_found:
            return (f"No configuration wins across datasets: the Friedman test finds no difference among the "
                    f"average ranks ({_p(self.friedman.f_p_value)}, alpha = {self.alpha:g}). "
                    f"Best {standing}: {' and '.join(self.sharing_best_rank)}.")
        rivals = self.not_different_from_best or tuple(c for c in self.sharing_best_rank if c != self.best)
        return (f"{self.best} ranks best ({standing}) but is not significantly better than {', '.join(rivals)} "
                f"(Holm, alpha = {self.alpha:g}), although the Friedman test finds differences among the configurations "
                f"({_p(self.friedman.f_p_value)}).")

    def caveats(self) -> list[str]:
        notes = []
        n = self.friedman.n_datasets
        if n < FEW_DATASETS:
            notes.append(f"Only {n} datasets: with fewer than about {FEW_DATASETS} the Friedman test has little power "
                         "to detect a difference, and it treats the datasets as independent samples of the corpora "
                         "the verdict is meant to cover.")
        if not self.differences_found:
            notes.append("The pairwise comparisons are shown for information only: the Friedman test did not reject "
                         "equal ranks, so none of them is a finding (Demšar 2006, section 3.2.2).")
        if len(self.sharing_best_rank) > 1:
            notes.append(f"{' and '.join(self.sharing_best_rank)} share the best average rank.")
        for configuration, where in self.table.left_out:
            notes.append(f"{configuration} is left out: it has no score on {', '.join(where)}.")
        return notes

    def lines(self) -> list[str]:
        """The verdict as lines of text for the CLI and the report."""
        out = [self.headline(), self.test_sentence()]
        out.append("Average ranks (1 = best): " + "; ".join(f"{c} {r:.2f}" for c, r in self.average_ranks.items()) + ".")
        out.append(f"Nemenyi critical difference at alpha = {self.alpha:g}: CD = {self.q_alpha:.3f} x "
                   f"sqrt({len(self.average_ranks)}x{len(self.average_ranks) + 1}/(6x{self.friedman.n_datasets})) "
                   f"= {self.critical_difference:.3f}.")
        if self.groups:
            out.append("Not significantly different (Nemenyi): " + "; ".join("{" + ", ".join(g) + "}" for g in self.groups) + ".")
        else:
            out.append("Nemenyi: every pair of configurations differs significantly.")
        out.append(f"Against {self.best} (Holm): " + "; ".join(
            f"{c.configuration} z = {c.z:.2f}, {_p(c.p_value)}, adjusted {_p(c.p_holm)}"
            f"{' (significantly worse)' if c.significant else ' (not significantly different)'}" for c in self.against_best) + ".")
        if self.bayesian is not None:
            out.append(self.bayesian.sentence())
        return out + [f"Caveat: {note}" for note in self.caveats()]


def across_verdict(scores: Mapping[str, Mapping[str, float]], *, metric: str, alpha: float = DEFAULT_ALPHA,
                   missing: Missing = "common", correct_ties: bool = True, rope: Optional[float] = None,
                   bayes_samples: int = 50_000, bayes_seed: int = 0) -> AcrossVerdict:
    """The whole procedure on ``scores[dataset][configuration]`` (higher is better).

    ``rope`` (in the score's units) asks for the Bayesian comparison of the two best-ranked configurations.
    """
    _check_alpha(alpha)
    table = score_table(scores, missing=missing)
    if len(table.configurations) < 2:
        left = f" ({len(table.left_out)} left out for missing scores)" if table.left_out else ""
        raise DataError(f"the across-datasets verdict needs at least 2 configurations scored on every dataset; "
                        f"got {len(table.configurations)}{left}")
    ranks = ranks_per_dataset(table.scores)
    friedman = friedman_test(ranks, correct_ties=correct_ties)
    mean_ranks = ranks.mean(axis=0)
    average = {c: float(r) for c, r in zip(table.configurations, mean_ranks)}
    average = {c: average[c] for c in _by_rank(average)}
    n, k = ranks.shape
    cd = critical_difference(k, n, alpha)
    best = next(iter(average))
    bayesian = None
    if rope is not None:
        second = list(average)[1]
        column = {c: i for i, c in enumerate(table.configurations)}
        bayesian = bayesian_comparison(best, table.scores[:, column[best]], second, table.scores[:, column[second]],
                                       rope=rope, samples=bayes_samples, seed=bayes_seed)
    return AcrossVerdict(
        metric=metric, alpha=alpha, table=table, ranks=ranks, average_ranks=average, friedman=friedman,
        q_alpha=nemenyi_critical_value(k, alpha), critical_difference=cd, pairs=nemenyi_pairs(average, n, alpha),
        against_best=comparisons_with_control(average, n, best, alpha), groups=non_significant_groups(average, cd),
        bayesian=bayesian,
    )


def _p(p: float) -> str:
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"
