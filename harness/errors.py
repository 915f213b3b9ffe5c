"""The tool's own error types. Each carries one line meant for the user."""

from __future__ import annotations

USAGE_EXIT_CODE = 2


class HarnessError(Exception):
    """A problem the user can fix; printed as one line, exit code 2."""

    exit_code = USAGE_EXIT_CODE


class SweepError(HarnessError):
    """The sweep file is malformed: names the file, line and key."""


class DataError(HarnessError):
    """A dataset cannot be read or does not fit the sweep."""
