"""Base class for the typed, frozen settings parsed from a sweep."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict


class Settings(BaseModel):
    """Frozen, strict about unknown keys."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    def as_params(self) -> dict:
        """The settings as a plain JSON-able dict (what keys and MLflow params are made of)."""
        return self.model_dump(mode="json")
