"""The across-datasets verdict (harness/score/across.py), checked against reference libraries and Demšar's worked example.

Sources named beside each check:
- scipy.stats.friedmanchisquare (the chi-square form, tie-corrected);
- statsmodels' AnovaRM (the Iman-Davenport F equals a repeated-measures ANOVA of the ranks);
- Demšar, "Statistical Comparisons of Classifiers over Multiple Data Sets", JMLR 7 (2006) 1-30:
  Table 5(a) (Nemenyi critical values), Table 6 and section 3.2.2's worked example (C4.5 variants on 14 data sets);
- statsmodels' qsturng (an independent studentized-range quantile);
- scikit-posthocs' posthoc_nemenyi_friedman and posthoc_siegel_friedman (post-hoc p-values);
- statsmodels' multipletests(method="holm") (Holm's adjusted p-values).
"""

from __future__ import annotations

import itertools
import math
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from harness.errors import DataError, HarnessError
from harness.score import across

# --- Demšar (2006), Table 6: AUC of four C4.5 variants on 14 data sets, with the ranks printed beside them ---
C45 = ("C4.5", "C4.5+m", "C4.5+cf", "C4.5+m+cf")
TABLE_6 = {  # data set: (AUCs as printed), (ranks as printed)
    "adult (sample)": ((0.763, 0.768, 0.771, 0.798), (4, 3, 2, 1)),
    "breast cancer": ((0.599, 0.591, 0.590, 0.569), (1, 2, 3, 4)),
    "breast cancer wisconsin": ((0.954, 0.971, 0.968, 0.967), (4, 1, 2, 3)),
    "cmc": ((0.628, 0.661, 0.654, 0.657), (4, 1, 3, 2)),
    "ionosphere": ((0.882, 0.888, 0.886, 0.898), (4, 2, 3, 1)),
    "iris": ((0.936, 0.931, 0.916, 0.931), (1, 2.5, 4, 2.5)),
    "liver disorders": ((0.661, 0.668, 0.609, 0.685), (3, 2, 4, 1)),
    "lung cancer": ((0.583, 0.583, 0.563, 0.625), (2.5, 2.5, 4, 1)),
    "lymphography": ((0.775, 0.838, 0.866, 0.875), (4, 3, 2, 1)),
    "mushroom": ((1.000, 1.000, 1.000, 1.000), (2.5, 2.5, 2.5, 2.5)),
    "primary tumor": ((0.940, 0.962, 0.965, 0.962), (4, 2.5, 1, 2.5)),
    "rheum": ((0.619, 0.666, 0.614, 0.669), (3, 2, 4, 1)),
    # printed as 0.975 twice but ranked 2 and 3: the unrounded AUCs differ, so C4.5+cf gets a 4th decimal here
    "voting": ((0.972, 0.981, 0.9751, 0.975), (4, 1, 2, 3)),
    "wine": ((0.957, 0.978, 0.946, 0.970), (3, 1, 4, 2)),
}
PAPER_SCORES = {d: dict(zip(C45, aucs)) for d, (aucs, _) in TABLE_6.items()}
PAPER_RANKS = np.array([ranks for _, ranks in TABLE_6.values()], dtype=float)

# Demšar (2006) Table 5(a): critical values of the two-tailed Nemenyi test, k = 2..10
TABLE_5A = {
    0.05: (1.960, 2.343, 2.569, 2.728, 2.850, 2.949, 3.031, 3.102, 3.164),
    0.10: (1.645, 2.052, 2.291, 2.459, 2.589, 2.693, 2.780, 2.855, 2.920),
}


def score_matrices(min_k=3, max_k=8, max_n=12, tied=False):
    """(datasets x configurations) score matrices; ``tied`` draws from a few values so that ties are common."""
    values = st.integers(0, 3) if tied else st.floats(0.0, 1.0, allow_nan=False, allow_subnormal=False)
    return st.tuples(st.integers(2, max_n), st.integers(min_k, max_k)).flatmap(
        lambda shape: st.lists(st.lists(values, min_size=shape[1], max_size=shape[1]), min_size=shape[0],
                               max_size=shape[0]).map(lambda rows: np.array(rows, dtype=float)))


def as_scores(matrix: np.ndarray) -> dict:
    return {f"d{i}": {f"c{j}": float(v) for j, v in enumerate(row)} for i, row in enumerate(matrix)}


# --- Friedman and Iman-Davenport -------------------------------------------------------------------------

@settings(max_examples=150, deadline=None)
@given(st.one_of(score_matrices(), score_matrices(tied=True)))
def test_friedman_chi2_equals_scipy_friedmanchisquare(matrix):
    # Reference: scipy.stats.friedmanchisquare(*columns), which applies the same tie correction.
    ranks = across.ranks_per_dataset(matrix)
    if np.all(ranks == ranks[:, :1]):
        return  # every dataset ties every configuration: scipy divides 0 by 0
    ours = across.friedman_test(ranks)
    reference = stats.friedmanchisquare(*matrix.T)
    assert ours.chi2 == pytest.approx(reference.statistic, abs=1e-9)
    assert ours.chi2_p_value == pytest.approx(reference.pvalue, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(st.one_of(score_matrices(max_k=5, max_n=8), score_matrices(max_k=5, max_n=8, tied=True)))
def test_iman_davenport_f_is_the_repeated_measures_anova_of_the_ranks(matrix):
    # Reference: statsmodels' AnovaRM on the ranks (Conover, Practical Nonparametric Statistics, 1999, 5.8:
    # with the tie-corrected chi2_F, Iman and Davenport's F_F is the F of this ANOVA).
    import pandas as pd
    from statsmodels.stats.anova import AnovaRM

    ranks = across.ranks_per_dataset(matrix)
    ours = across.friedman_test(ranks)
    if ours.unanimous or np.all(ranks == ranks[:, :1]):
        return  # zero residual variance: the ANOVA's F is undefined
    n, k = ranks.shape
    long = pd.DataFrame({"rank": ranks.ravel(), "dataset": np.repeat(np.arange(n), k), "config": np.tile(np.arange(k), n)})
    table = AnovaRM(long, "rank", "dataset", within=["config"]).fit().anova_table
    assert ours.f == pytest.approx(table["F Value"].iloc[0], rel=1e-9)
    assert ours.f_df == (int(table["Num DF"].iloc[0]), int(table["Den DF"].iloc[0]))
    assert ours.f_p_value == pytest.approx(table["Pr > F"].iloc[0], abs=1e-9)


def test_demsar_worked_example_ranks_and_statistics():
    # Demšar (2006), Table 6 and section 3.2.2: the ranks in parentheses, the average ranks 3.143, 2.000, 2.893,
    # 1.964, chi2_F = 9.28 and F_F = 3.69 on (3, 39) degrees of freedom, critical value of F(3, 39) at 0.05 = 2.85.
    table = across.score_table(PAPER_SCORES)
    ranks = across.ranks_per_dataset(table.scores)
    np.testing.assert_array_equal(ranks, PAPER_RANKS)
    np.testing.assert_allclose(ranks.mean(axis=0), [3.143, 2.000, 2.893, 1.964], atol=5e-4)
    paper_form = across.friedman_test(ranks, correct_ties=False)  # the paper's formula has no tie correction
    assert paper_form.chi2 == pytest.approx(9.28, abs=5e-3)
    assert paper_form.f == pytest.approx(3.69, abs=5e-3)
    assert paper_form.f_df == (3, 39)
    assert stats.f.ppf(0.95, *paper_form.f_df) == pytest.approx(2.85, abs=5e-3)
    assert paper_form.f_p_value < 0.05  # "so we reject the null-hypothesis"
    # The same ranks with the tie correction: scipy's value (the table has ties on 4 data sets).
    corrected = across.friedman_test(ranks)
    assert corrected.tie_corrected and not paper_form.tie_corrected
    assert corrected.chi2 == pytest.approx(stats.friedmanchisquare(*table.scores.T).statistic, abs=1e-9)


def test_demsar_worked_example_nemenyi():
    # Demšar (2006), section 3.2.2: "The critical value is 2.569 and the corresponding CD is 1.25"; even the best and
    # the worst do not differ. At alpha = 0.10, CD = 2.291 * sqrt(20/84) = 1.12: C4.5 is worse than C4.5+m and
    # C4.5+m+cf, and C4.5+cf cannot be placed in either group.
    at_05 = across.across_verdict(PAPER_SCORES, metric="AUC", correct_ties=False)
    assert at_05.q_alpha == pytest.approx(2.569, abs=5e-4)
    assert at_05.critical_difference == pytest.approx(1.25, abs=5e-3)
    assert not any(p.significant for p in at_05.pairs)
    assert at_05.groups == (("C4.5+m+cf", "C4.5+m", "C4.5+cf", "C4.5"),)

    at_10 = across.across_verdict(PAPER_SCORES, metric="AUC", alpha=0.10, correct_ties=False)
    assert at_10.critical_difference == pytest.approx(1.12, abs=5e-3)
    assert {(p.better, p.worse) for p in at_10.pairs if p.significant} == {("C4.5+m+cf", "C4.5"), ("C4.5+m", "C4.5")}
    assert at_10.groups == (("C4.5+m+cf", "C4.5+m", "C4.5+cf"), ("C4.5+cf", "C4.5"))


def test_demsar_worked_example_holm_against_a_control():
    # Demšar (2006), section 3.2.2, the table after "The standard error is SE = 0.488": against C4.5,
    # z = 2.416, 2.342, 0.512 with p = 0.016, 0.019, 0.607; Holm rejects the first two and retains the third.
    # The paper rounds the ranks to 3 decimals before dividing; its 0.607 is 2 * (1 - Phi(0.512)) = 0.6086 rounded down.
    average = dict(zip(C45, across.ranks_per_dataset(across.score_table(PAPER_SCORES).scores).mean(axis=0)))
    assert across.rank_standard_error(4, 14) == pytest.approx(0.488, abs=5e-4)
    rows = across.comparisons_with_control(average, 14, "C4.5", alpha=0.05)
    assert [r.configuration for r in rows] == ["C4.5+m+cf", "C4.5+m", "C4.5+cf"]
    np.testing.assert_allclose([abs(r.z) for r in rows], [2.416, 2.342, 0.512], atol=2e-3)
    np.testing.assert_allclose([r.p_value for r in rows], [0.016, 0.019, 0.607], atol=2e-3)
    assert [r.significant for r in rows] == [True, True, False]


def test_iman_davenport_reads_the_rejection_the_chi_square_form_misses():
    # Demšar (2006) 3.2.2: chi2_F is "undesirably conservative"; on Table 6 without the tie correction the F form's p
    # is below the chi-square form's.
    result = across.friedman_test(PAPER_RANKS, correct_ties=False)
    assert result.f_p_value < result.chi2_p_value


@pytest.mark.parametrize("k", [2, 3, 4])
@pytest.mark.parametrize("n", [2, 3])
@pytest.mark.parametrize("pattern", ["no ties", "one tie"])
def test_unanimous_p_value_is_the_exact_chance_of_unanimity(k, n, pattern):
    # Enumerate every arrangement of each dataset's ranks (its tie pattern permuted): the share in which all
    # datasets agree must equal the p-value given when chi2_F reaches its ceiling.
    base = np.arange(1.0, k + 1)
    if pattern == "one tie":
        base[:2] = 1.5
    arrangements = sorted(set(itertools.permutations(base)))
    agree = sum(1 for rows in itertools.product(arrangements, repeat=n) if all(r == rows[0] for r in rows))
    exact = agree / len(arrangements) ** n
    result = across.friedman_test(np.tile(base, (n, 1)))
    if len(arrangements) == 1:  # every configuration tied on every dataset: nothing to test
        assert result.chi2 == 0.0 and result.f_p_value == 1.0 == exact
        return
    assert result.unanimous and math.isinf(result.f)
    assert result.f_p_value == pytest.approx(exact, rel=1e-12)


def test_unanimous_two_configurations_on_three_datasets_is_not_a_finding():
    verdict = across.across_verdict({d: {"a": 1.0, "b": 0.0} for d in ("x", "y", "z")}, metric="ari")
    assert verdict.friedman.f_p_value == pytest.approx(0.25)  # 2 orders, 3 datasets: (1/2)^2
    assert verdict.winner is None and not verdict.differences_found
    assert "exact chance under equal ranks: p = 0.250" in verdict.test_sentence()


def test_friedman_refuses_what_it_cannot_test():
    with pytest.raises(DataError, match="at least 2 datasets"):
        across.friedman_test(np.array([[1.0, 2.0, 3.0]]))
    with pytest.raises(DataError, match="at least 2 configurations"):
        across.friedman_test(np.ones((3, 1)))
    with pytest.raises(ValueError, match="one ranking per row"):
        across.friedman_test(np.array([[1.0, 1.0], [1.0, 2.0]]))
    with pytest.raises(ValueError, match="2-D"):
        across.friedman_test(np.array([1.0, 2.0]))


# --- Nemenyi ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("alpha", sorted(TABLE_5A))
@pytest.mark.parametrize("k", range(2, 11))
def test_nemenyi_critical_values_match_demsar_table_5a(alpha, k):
    # Demšar (2006), Table 5(a). Its last digit is neither rounded nor truncated throughout (k = 3: 2.3437 printed
    # 2.343; k = 7: 2.9483 printed 2.949), so the check is to 0.001.
    assert across.nemenyi_critical_value(k, alpha) == pytest.approx(TABLE_5A[alpha][k - 2], abs=1e-3)


@pytest.mark.parametrize("k", [2, 3, 5, 10, 20])
def test_nemenyi_critical_values_match_statsmodels_qsturng(k):
    # Reference: statsmodels.stats.libqsturng.qsturng, Gleason's (1999) approximation, independent of scipy's
    # integration; the two differ by at most 2.7e-4 (measured for k = 2..20 at both levels).
    from statsmodels.stats.libqsturng import qsturng

    for alpha in (0.05, 0.10):
        assert across.nemenyi_critical_value(k, alpha) == pytest.approx(qsturng(1 - alpha, k, np.inf) / math.sqrt(2), abs=5e-4)


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.10])
def test_nemenyi_for_two_configurations_is_the_normal_quantile(alpha):
    # The range of two standard normals is |Z1 - Z2| ~ sqrt(2) |N(0, 1)|: q_alpha(k = 2) = z_{1 - alpha/2} exactly.
    assert across.nemenyi_critical_value(2, alpha) == pytest.approx(stats.norm.ppf(1 - alpha / 2), abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(st.one_of(score_matrices(), score_matrices(tied=True)))
def test_nemenyi_p_values_equal_scikit_posthocs(matrix):
    # Reference: scikit_posthocs.posthoc_nemenyi_friedman (rows are blocks, columns are groups).
    import scikit_posthocs

    ranks = across.ranks_per_dataset(matrix)
    ours = across.nemenyi_p_values(ranks.mean(axis=0), matrix.shape[0])
    reference = scikit_posthocs.posthoc_nemenyi_friedman(matrix).to_numpy()
    np.testing.assert_allclose(ours, reference, atol=1e-9)


@settings(max_examples=100, deadline=None)
@given(st.one_of(score_matrices(), score_matrices(tied=True)), st.sampled_from([0.05, 0.10]))
def test_nemenyi_decisions_by_critical_difference_agree_with_p_values(matrix, alpha):
    verdict = across.across_verdict(as_scores(matrix), metric="m", alpha=alpha)
    for pair in verdict.pairs:
        if abs(pair.rank_difference - verdict.critical_difference) > 1e-9:
            assert pair.significant == (pair.p_value < alpha)
    assert len(verdict.pairs) == math.comb(len(verdict.average_ranks), 2)


def maximal_cliques_by_brute_force(average: dict, cd: float) -> set:
    names = list(average)
    cliques = [set(s) for size in range(2, len(names) + 1) for s in itertools.combinations(names, size)
               if all(abs(average[a] - average[b]) < cd for a, b in itertools.combinations(s, 2))]
    return {frozenset(c) for c in cliques if not any(c < other for other in cliques)}


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(2, 40).map(lambda r: r / 4), min_size=2, max_size=8),
       st.sampled_from([0.3, 0.75, 1.0, 1.5, 2.5, 20.0]))
def test_groups_are_the_maximal_sets_of_configurations_not_significantly_different(ranks, cd):
    # Every set of two or more configurations whose pairwise rank differences are all below CD, and that no larger
    # such set contains: enumerated over all subsets.
    average = {f"c{i}": r for i, r in enumerate(ranks)}
    groups = across.non_significant_groups(average, cd)
    assert {frozenset(g) for g in groups} == maximal_cliques_by_brute_force(average, cd)
    assert len(groups) == len(set(groups))


# --- Holm against the best -------------------------------------------------------------------------------

def test_holm_adjusted_equals_statsmodels(monkeypatch):
    # Reference: statsmodels.stats.multitest.multipletests(method="holm"), on 200 vectors of 1 to 12 p-values,
    # with repeated values, zeros and ones among them.
    import gc

    from statsmodels.stats.multitest import multipletests

    monkeypatch.setattr(gc, "collect", lambda *args: 0)  # multipletests runs a full collection on every call
    rng = np.random.default_rng(0)
    for _ in range(200):
        p = rng.choice([0.0, 0.001, 0.01, 0.02, 0.04, 0.3, 1.0], size=rng.integers(1, 13)) if rng.random() < 0.3 \
            else rng.random(rng.integers(1, 13)) ** 3
        np.testing.assert_allclose(across.holm_adjusted(p), multipletests(p, method="holm")[1], atol=1e-12)


def holm_step_down(p_values, alpha):
    """Demšar (2006) 3.2.2 in words: compare the i-th smallest p with alpha / (m - i + 1); stop at the first retained."""
    order = np.argsort(p_values, kind="stable")
    rejected = np.zeros(len(p_values), dtype=bool)
    for i, index in enumerate(order):
        if not p_values[index] < alpha / (len(p_values) - i):
            break
        rejected[index] = True
    return rejected


@settings(max_examples=150, deadline=None)
@given(st.one_of(score_matrices(max_n=20), score_matrices(max_n=20, tied=True)), st.sampled_from([0.05, 0.10]))
def test_comparisons_against_the_best_follow_holms_step_down_rule(matrix, alpha):
    # Raw p-values. Reference: scikit_posthocs.posthoc_siegel_friedman(p_adjust=None), the same z on average ranks.
    import scikit_posthocs

    verdict = across.across_verdict(as_scores(matrix), metric="m", alpha=alpha)
    raw = scikit_posthocs.posthoc_siegel_friedman(matrix, p_adjust=None)
    raw.index = raw.columns = [f"c{j}" for j in range(matrix.shape[1])]
    rows = verdict.against_best
    assert {r.configuration for r in rows} == set(verdict.average_ranks) - {verdict.best}
    for row in rows:
        assert row.p_value == pytest.approx(raw.loc[verdict.best, row.configuration], abs=1e-12)
    p = np.array([r.p_value for r in rows])
    np.testing.assert_array_equal([r.significant for r in rows], holm_step_down(p, alpha))


# --- the table of scores and the verdict -----------------------------------------------------------------

def test_ranks_put_the_highest_score_first_and_average_ties():
    ranks = across.ranks_per_dataset(np.array([[0.9, 0.1, 0.5], [0.2, 0.2, 0.7]]))
    np.testing.assert_array_equal(ranks, [[1, 3, 2], [2.5, 2.5, 1]])


def test_a_configuration_missing_on_a_dataset_is_refused_or_left_out_and_said():
    scores = {"news": {"a": 0.5, "b": 0.4, "c": 0.3}, "ag": {"a": 0.6, "b": float("nan")},
              "synth": {"a": 0.1, "b": 0.2, "c": None}}
    with pytest.raises(DataError, match=r"configuration 'b' has no score on dataset\(s\) ag \(and 1 more"):
        across.score_table(scores, missing="refuse")
    table = across.score_table(scores, missing="common")
    assert table.configurations == ("a",)
    assert table.left_out == (("b", ("ag",)), ("c", ("ag", "synth")))
    with pytest.raises(DataError, match="at least 2 configurations scored on every dataset; got 1 .2 left out"):
        across.across_verdict(scores, metric="ari")
    scores["ag"]["b"] = scores["ag"]["c"] = 0.2
    verdict = across.across_verdict(scores, metric="ari")
    assert verdict.table.configurations == ("a", "b")
    assert "c is left out: it has no score on synth." in verdict.caveats()


@pytest.mark.parametrize("n", [2, 3, 4, 5, 8])
def test_few_datasets_caveat_below_five(n):
    rng = np.random.default_rng(n)
    verdict = across.across_verdict(as_scores(rng.random((n, 4))), metric="ari")
    said = any("little power" in note and "independent samples" in note for note in verdict.caveats())
    assert said == (n < across.FEW_DATASETS)


def test_a_clear_winner_is_named_and_the_rest_is_said():
    rng = np.random.default_rng(0)
    matrix = rng.random((12, 4)) * 0.1 + np.array([0.9, 0.5, 0.45, 0.4])  # c0 best on every dataset
    verdict = across.across_verdict(as_scores(matrix), metric="ari")
    assert verdict.winner == "c0" and verdict.differences_found
    assert verdict.headline().startswith("c0 wins across datasets (average rank 1.00 among 4 configurations over 12 datasets, by ari)")
    text = "\n".join(verdict.lines())
    assert "Iman-Davenport F(3, 33)" in text and "CD = " in text and "Against c0 (Holm)" in text
    assert not any("little power" in line for line in verdict.lines())


def test_no_winner_when_the_test_finds_nothing():
    rng = np.random.default_rng(3)
    verdict = across.across_verdict(as_scores(rng.random((6, 3))), metric="ari")
    assert not verdict.differences_found and verdict.winner is None
    assert verdict.headline().startswith("No configuration wins across datasets")
    assert any("for information only" in note for note in verdict.caveats())


def test_a_tie_for_the_best_rank_is_no_winner():
    scores = {f"d{i}": {"a": 1.0, "b": 1.0, "c": 0.0, "d": -1.0} for i in range(10)}
    verdict = across.across_verdict(scores, metric="ari")
    assert verdict.differences_found and verdict.sharing_best_rank == ("a", "b")
    assert verdict.winner is None and "a and b share the best average rank." in verdict.caveats()
    assert verdict.headline().startswith("a ranks best") and "not significantly better than b" in verdict.headline()


def test_alpha_outside_the_unit_interval_is_refused():
    with pytest.raises(ValueError, match="'alpha' parameter must lie in"):
        across.across_verdict(PAPER_SCORES, metric="AUC", alpha=1.5)


# --- the Bayesian comparison of two finalists ------------------------------------------------------------

def test_bayesian_comparison_says_practically_equivalent_and_better():
    pytest.importorskip("baycomp")
    rng = np.random.default_rng(0)
    base = rng.random(10)
    same = across.bayesian_comparison("a", base, "b", base + rng.normal(0, 0.001, 10), rope=0.01, samples=5000)
    assert same.conclusion == "practically equivalent" and same.p_equivalent > 0.95
    ahead = across.bayesian_comparison("a", base + 0.1, "b", base, rope=0.01, samples=5000)
    assert ahead.conclusion == "a is better" and ahead.p_first_better > 0.95
    swapped = across.bayesian_comparison("b", base, "a", base + 0.1, rope=0.01, samples=5000)
    assert swapped.conclusion == "a is better" and swapped.p_second_better == pytest.approx(ahead.p_first_better)
    for result in (same, ahead, swapped):
        assert result.p_first_better + result.p_equivalent + result.p_second_better == pytest.approx(1.0)
    again = across.bayesian_comparison("a", base + 0.1, "b", base, rope=0.01, samples=5000)
    assert again == ahead  # seeded


def test_bayesian_comparison_of_the_two_best_in_the_verdict():
    pytest.importorskip("baycomp")
    verdict = across.across_verdict(PAPER_SCORES, metric="AUC", rope=0.01, bayes_samples=5000)
    assert (verdict.bayesian.first, verdict.bayesian.second) == ("C4.5+m+cf", "C4.5+m")
    assert verdict.bayesian.sentence() in verdict.lines()


def test_bayesian_comparison_without_baycomp_says_how_to_install(monkeypatch):
    monkeypatch.setitem(sys.modules, "baycomp", None)  # makes `import baycomp` raise ImportError
    with pytest.raises(HarnessError, match=r"pip install 'harness\[bayes\]'"):
        across.bayesian_comparison("a", [0.1, 0.2], "b", [0.2, 0.3], rope=0.01)
