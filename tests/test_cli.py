"""The command line explains itself: a version, help on every option, examples that parse, no ignored options,
and next steps after a run that are commands which work."""

from __future__ import annotations

import argparse
import shlex

import pytest

from harness import __version__
from harness.cli import _EXAMPLES, main, parser

from conftest import write_sweep


def _parsers(top: argparse.ArgumentParser, path: tuple[str, ...] = ()):
    """Every parser of the command line with its command words."""
    yield path, top
    for action in top._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _parsers(sub, (*path, name))


ALL = list(_parsers(parser()))


def test_version(capsys):
    with pytest.raises(SystemExit) as done:
        main(["--version"])
    assert done.value.code == 0 and capsys.readouterr().out.strip() == f"harness {__version__}"


@pytest.mark.parametrize("path, command", ALL, ids=[" ".join(p) or "harness" for p, _ in ALL])
def test_every_option_and_argument_has_help(path, command):
    undocumented = [a.dest for a in command._actions
                    if not isinstance(a, argparse._SubParsersAction) and not (a.help and a.help.strip())]
    assert undocumented == [], (path, undocumented)


def test_options_that_default_say_their_default():
    # An option with a non-trivial default names it in its help (flags and 'None' defaults have nothing to say).
    silent = [(" ".join(path), a.dest) for path, command in ALL for a in command._actions
              if a.option_strings and a.default not in (None, False, argparse.SUPPRESS) and a.dest != "help"
              and "default" not in (a.help or "")]
    assert silent == []


@pytest.mark.parametrize("command", ["ui", "report", "cite", "export"])
def test_commands_that_do_not_use_the_stage_cache_do_not_offer_it(command, capsys):
    with pytest.raises(SystemExit) as done:
        parser().parse_args([command, *(["demo"] if command != "ui" else []), "--cache-dir", "x",
                             *(["--to", "x.csv"] if command == "export" else [])])
    assert done.value.code == 2 and "unrecognized arguments: --cache-dir" in capsys.readouterr().err


@pytest.mark.parametrize("example, what", _EXAMPLES)
def test_every_example_in_the_epilog_parses(example, what):
    words = shlex.split(example.split(" > ")[0])
    assert words[0] == "harness"
    parser().parse_args(words[1:])  # raises SystemExit on a wrong example
    assert example in parser().format_help()


def test_a_run_ends_with_next_steps_that_parse(tmp_path, tiny_model_dir, capsys):
    sweep = write_sweep(tmp_path, f"""
name: steps
datasets:
  - {{source: synthetic, n_texts: 120, topic_share: 0.5, seed: 3}}
models:
  - {{name: {tiny_model_dir}, max_length: 32}}
grid:
  pooling: [mean]
  reduce:
    - {{method: pca, n_components: 4}}
  cluster:
    - {{method: kmeans, k: labels}}
evidence: {{resamples: 0}}
""")
    results = tmp_path / "elsewhere"
    assert main(["run", str(sweep), "--results-dir", str(results), "--no-progress"]) == 0
    out = capsys.readouterr().out
    steps = out.split("next:\n", 1)[1].strip().splitlines()
    commands = [line.strip().split("  ")[0] for line in steps]
    assert commands == [f"harness report steps --results-dir {results}", f"harness ui --results-dir {results}",
                        f"harness cite steps --results-dir {results}",
                        f"harness export steps --to steps.csv --results-dir {results}"]
    for command in commands:
        parser().parse_args(shlex.split(command)[1:])
