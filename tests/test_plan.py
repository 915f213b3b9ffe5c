"""Planning: trial keys, stage sharing, and the plan command."""

from __future__ import annotations

from harness.cli import main
from harness.engine.runner import prepared_sweep

from conftest import write_sweep

SWEEP = """
name: keys
datasets:
  - {source: synthetic, n_texts: 200, seed: 1}
models: [sentence-transformers/all-MiniLM-L6-v2]
grid:
  pooling: [cls, mean, max]
  layers: [last, mean_last_4]
  reduce:
    - {method: umap, n_components: 5, n_neighbors: 10}
    - {method: pca, n_components: 8}
  cluster:
    - {method: hdbscan, min_cluster_size: 10}
    - {method: kmeans, k: labels}
  seeds: [0, 1]
"""

REORDERED = """
grid:
  seeds: [0, 1]
  cluster:
    - {k: labels, method: kmeans}
    - {min_cluster_size: 10, method: hdbscan}
  reduce:
    - {n_components: 8, method: pca}
    - {n_neighbors: 10, method: umap, n_components: 5}
  layers: [mean_last_4, last]
  pooling: [max, cls, mean]
models: [sentence-transformers/all-MiniLM-L6-v2]
datasets:
  - {seed: 1, n_texts: 200, source: synthetic}
name: keys
"""


def test_trial_keys_do_not_depend_on_key_or_list_order(tmp_path):
    first = prepared_sweep(write_sweep(tmp_path, SWEEP, "a.yaml"))
    second = prepared_sweep(write_sweep(tmp_path, REORDERED, "b.yaml"))
    assert len(first.trials) == 3 * 2 * 2 * 2 * 2 == 48
    assert {t.key for t in first.trials} == {t.key for t in second.trials}
    assert len({t.key for t in first.trials}) == 48


def test_stages_are_shared_along_common_prefixes(tmp_path):
    trials = prepared_sweep(write_sweep(tmp_path, SWEEP)).trials
    distinct = {kind: len({t.stages[kind].key for t in trials}) for kind in ("encode", "pool", "reduce", "cluster")}
    # One forward pass; 6 pooled variants; PCA is seed-free (6 fits) while UMAP is fitted per seed (12).
    # HDBSCAN is seed-free: one per reduction (18). k-means is seeded: on a seed-free PCA output it runs once per
    # seed (6 x 2), on a seeded UMAP output only with that UMAP's own seed (12): 24.
    assert distinct == {"encode": 1, "pool": 6, "reduce": 6 + 12, "cluster": 18 + 24}


def test_a_changed_setting_changes_only_downstream_keys(tmp_path):
    base = prepared_sweep(write_sweep(tmp_path, SWEEP, "a.yaml")).trials[0]
    changed = prepared_sweep(write_sweep(tmp_path, SWEEP.replace("min_cluster_size: 10", "min_cluster_size: 12"), "b.yaml")).trials[0]
    for kind in ("encode", "pool", "transform", "reduce"):
        assert base.stages[kind].key == changed.stages[kind].key
    assert base.stages["cluster"].key != changed.stages["cluster"].key


def test_plan_command_counts_work_without_running(tmp_path, capsys):
    assert main(["plan", str(write_sweep(tmp_path, SWEEP)), "--results-dir", str(tmp_path / "results")]) == 0
    out = capsys.readouterr().out
    assert "48  (42 computed, 6 equivalent to another trial" in out  # PCA + HDBSCAN is seed-free: 6 pairs
    assert "forward passes        1      0      1" in out
    assert "reductions           18      0     18  (pca 6, umap 12)" in out
    # UMAP's neighbour graph depends on the vectors, metric and n_neighbors only: one per pooled variant (6),
    # shared by the 2 seeds' fits
    assert "neighbour graphs      6      0      6" in out
    assert not (tmp_path / "results").exists()


def test_every_configuration_and_run_has_its_own_name(tmp_path, tiny_model_dir):
    # Variants generated from the settings models: every reducer and clusterer with each of its fields changed in
    # turn (each value of a Literal), transform: l2 vs normalize: l2, and two models whose folders share a name.
    # Distinct configurations (keys) must have distinct names, and distinct trials distinct run names.
    import shutil
    import typing

    import yaml

    from harness.sweep import GridSettings
    from test_trial_key import _discriminator, _generic_changes, _union_members

    def variants(annotation) -> list[dict]:
        out = []
        for cls in _union_members(annotation):
            method = _discriminator(cls)
            base = {method: typing.get_args(cls.model_fields[method].annotation)[0]}
            instance = cls(**base)
            out.append(instance.as_params())  # as validated, so that a value filled in by default is no new variant
            singles = [{name: value} for name, field in cls.model_fields.items() if name != method
                       for value in _generic_changes(field.annotation, getattr(instance, name))]
            for change in singles:
                # A change the settings refuse alone (metric cosine under ward linkage) is paired with the first
                # other change that makes it valid.
                for extra in [{}] + [other for other in singles if other.keys() != change.keys()]:
                    try:
                        out.append(cls(**base, **change, **extra).as_params())
                    except ValueError:
                        continue
                    break
        return [dict(t) for t in {tuple(sorted(v.items())) for v in out}]  # distinct

    reducers, clusterers = variants(GridSettings.model_fields["reduce"].annotation), variants(GridSettings.model_fields["cluster"].annotation)
    assert {"umap", "pca", "none"} <= {r["method"] for r in reducers} and len(reducers) > 8
    for parent in ("team_a", "team_b"):
        shutil.copytree(tiny_model_dir, tmp_path / parent / "encoder")
    sweep = {
        "name": "names",
        "datasets": [{"source": "synthetic", "n_texts": 60}],
        "models": [str(tmp_path / "team_a" / "encoder"), str(tmp_path / "team_b" / "encoder"),
                   {"name": str(tmp_path / "team_a" / "encoder"), "family": "transformer"}],
        "grid": {"pooling": ["mean"], "transform": ["none", "l2", [{"method": "whiten", "k": 8}]], "normalize": ["none", "l2"],
                 "reduce": reducers, "cluster": clusterers, "seeds": [0, 1]},
    }
    path = tmp_path / "names.yaml"
    path.write_text(yaml.safe_dump(sweep))
    trials = prepared_sweep(path).trials
    configurations = {t.config_key: t.config_name for t in trials}
    assert len(set(configurations.values())) == len(configurations) == 3 * 3 * 2 * len(reducers) * len(clusterers)
    assert len({t.name for t in trials}) == len({t.key for t in trials}) == len(trials)
    names = set(configurations.values())
    assert any("/l2/" in n for n in names) and any("/none+l2/" in n for n in names)  # transform l2, normalize l2
    assert any("/team_a--encoder/" in n for n in names) and any("/team_b--encoder/" in n for n in names)
