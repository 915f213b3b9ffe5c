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
