"""Every malformed sweep or data file gets one line naming file and key, exit 2, and writes nothing."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from harness.cli import main

BAD_INPUT = Path(__file__).parent / "bad_input"
CASES = sorted(BAD_INPUT.glob("*.yaml"))


def _expected(path: Path) -> str:
    first = path.read_text(encoding="utf-8", errors="replace").splitlines()[0]
    assert first.startswith("# expect: "), f"{path.name} must start with '# expect: <message>'"
    return first.removeprefix("# expect: ")


def test_there_are_at_least_twenty_bad_inputs():
    assert len(CASES) >= 20


@pytest.mark.parametrize("path", CASES, ids=[p.stem for p in CASES])
def test_bad_input_gives_one_line_exit_2_and_writes_nothing(path, tmp_path, capsys):
    results = tmp_path / "results"
    code = main(["run", str(path), "--results-dir", str(results), "--no-progress"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1, err
    assert _expected(path) in err
    assert str(path) in err or "data/" in err or str(BAD_INPUT / "data") in err  # names the file at fault
    assert not results.exists()  # no MLflow store, no artifacts, no cache


def test_console_script_exits_2_with_one_line(tmp_path):
    path = BAD_INPUT / "unknown_pooling.yaml"
    done = subprocess.run(
        [sys.executable, "-m", "harness.cli", "run", str(path), "--results-dir", str(tmp_path / "r")],
        capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 2
    assert done.stderr.strip() == (
        f"harness: error: {path}:8: grid.pooling[1]: 'maxx' is not a pooling; expected one of cls, last_token, max, "
        "mean, mean_sqrt_len, weighted_mean (did you mean 'max'?)"
    )


def test_a_fifty_megabyte_text_is_refused(tmp_path, capsys):
    data = tmp_path / "huge.csv"
    with data.open("w") as handle:
        handle.write("text,label\nshort request,a\n")
        handle.write("x" * 50_000_000 + ",b\n")
    sweep = tmp_path / "huge.yaml"
    sweep.write_text("name: huge\ndatasets:\n  - {source: file, path: huge.csv}\nmodels: [sentence-transformers/all-MiniLM-L6-v2]\n"
                     "grid:\n  pooling: [mean]\n  cluster:\n    - {method: kmeans, k: 2}\n")
    assert main(["run", str(sweep), "--results-dir", str(tmp_path / "results")]) == 2
    err = capsys.readouterr().err.strip()
    assert "row 1 has 50,000,000 characters, over max_chars=1,000,000" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "results").exists()


def test_a_folder_given_as_the_data_file_is_refused(tmp_path, capsys):
    (tmp_path / "data.csv").mkdir()
    sweep = tmp_path / "folder.yaml"
    sweep.write_text("name: folder\ndatasets:\n  - {source: file, path: data.csv}\nmodels: [sentence-transformers/all-MiniLM-L6-v2]\n"
                     "grid:\n  pooling: [mean]\n  cluster:\n    - {method: kmeans, k: 2}\n")
    assert main(["run", str(sweep), "--results-dir", str(tmp_path / "results")]) == 2
    assert "datasets[0].path: no such file" in capsys.readouterr().err


def test_an_unreachable_tracking_server_fails_at_once(tmp_path, capsys):
    sweep = BAD_INPUT.parent / "bad_input" / "unknown_pooling.yaml"
    good = tmp_path / "good.yaml"
    good.write_text(sweep.read_text().replace("maxx", "max"))
    results = tmp_path / "results"
    assert main(["run", str(good), "--results-dir", str(results), "--tracking-uri", "http://127.0.0.1:9"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("harness: error: tracking server http://127.0.0.1:9: unreachable") and len(err.splitlines()) == 1
    assert not results.exists()
