"""What a reviewer reads after a run: the report's analysis and page, its assembly from the store,
the citation card and the export."""

from importlib import import_module

# Re-exported on first use, so that importing one module of this package loads no other.
_EXPORTS = {
    "configuration_table": "export",
    "write_citations": "cite",
    "write_report": "build",
}
__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        return getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
