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
