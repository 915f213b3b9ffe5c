"""Lazy re-exports for the subpackages: a name is imported from its module on first use, so that importing one
module of a subpackage loads no other (and `harness --help` stays light)."""

from __future__ import annotations

from importlib import import_module
from typing import Any, Callable


def lazy_exports(package: str, exports: dict[str, str]) -> tuple[Callable[[str], Any], list[str]]:
    """A module ``__getattr__`` that imports ``name`` from ``package.<exports[name]>`` when first asked, and the
    package's ``__all__``."""

    def __getattr__(name: str) -> Any:
        if name in exports:
            return getattr(import_module(f"{package}.{exports[name]}"), name)
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    return __getattr__, sorted(exports)
