"""What a reviewer reads after a run: the report's analysis and page, its assembly from the store,
the citation card and the export."""

from harness._lazy import lazy_exports

# Re-exported on first use, so that importing one module of this package loads no other.
__getattr__, __all__ = lazy_exports(__name__, {
    "configuration_table": "export",
    "write_citations": "cite",
    "write_report": "build",
})
