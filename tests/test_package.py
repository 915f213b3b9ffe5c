"""The package says what it is: its licence, in the file and in the metadata."""

from __future__ import annotations

import tomllib

from conftest import REPO


def test_the_licence_file_and_the_project_metadata_agree():
    project = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]
    licence = (REPO / "LICENSE").read_text()
    assert project["license"] == "MIT" and project["license-files"] == ["LICENSE"]
    assert licence.startswith("MIT License") and "Permission is hereby granted, free of charge" in licence
    assert "datasets>=5.2,<6" in [d.split("#")[0].strip() for d in project["dependencies"]]


def test_the_readme_answers_a_new_users_first_questions():
    readme = (REPO / "README.md").read_text()
    project = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]
    assert project["requires-python"] == ">=3.11,<3.12" and "3.11 only" in readme  # the README says what pip enforces
    for needed in ("source .venv/bin/activate", ".venv/bin/harness", "make demo TORCH_INDEX=",
                   "--index-url https://download.pytorch.org/whl/cpu", "[DEVELOPERS.md](DEVELOPERS.md)",
                   "harness datasets mirror --out"):
        assert needed in readme, needed
    assert "TORCH_INDEX" in (REPO / "Makefile").read_text()


def test_the_readme_and_the_sweeps_name_no_workplace_path():
    # A user's clone has no sibling shared/ folder: public data comes from the public route or HARNESS_DATA_DIR.
    texts = {"README.md": (REPO / "README.md").read_text()}
    texts.update({str(p.relative_to(REPO)): p.read_text() for p in (REPO / "experiments").rglob("*") if p.is_file()})
    assert [name for name, text in texts.items() if "shared/" in text] == []
