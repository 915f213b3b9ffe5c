"""Base class for the typed, frozen settings parsed from a sweep."""

from __future__ import annotations

from pathlib import Path

from pydantic import BaseModel, ConfigDict, ValidationInfo


class Settings(BaseModel):
    """Frozen, strict about unknown keys."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    def as_params(self) -> dict:
        """The settings as a plain JSON-able dict (what keys and MLflow params are made of)."""
        return self.model_dump(mode="json")


def relative_to_sweep(path: Path, info: ValidationInfo) -> Path:
    """A path from the sweep file, resolved against the sweep file's folder (passed as validation context)."""
    base = Path((info.context or {}).get("base_dir", "."))
    return (path if path.is_absolute() else base / path).resolve()
