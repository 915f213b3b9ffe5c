"""Named points where a test can make the process die abruptly, to prove that recovery works.

Set HARNESS_CRASH_AT=point or point:n and the process sends itself SIGKILL the
n-th time (default: the first) it reaches that point. Unset, nothing happens.
With HARNESS_CRASH_ONCE=PATH as well, only the first process to create PATH dies: a
cluster worker that replaces a killed one, or its siblings, then run on.
"""

from __future__ import annotations

import os
import signal
from collections import Counter
from typing import Callable, Optional

VARIABLE = "HARNESS_CRASH_AT"
ONCE_VARIABLE = "HARNESS_CRASH_ONCE"
POINTS = ("model_load", "encode_batch", "umap_fit", "between_trials", "mlflow_write", "archive_unpack", "encode_chunk")
_reached: Counter = Counter()


def crash_point(name: str, before: Optional[Callable[[], None]] = None) -> None:
    """``before``: called just before the kill, to make the point what its name says (e.g. wait until queued
    MLflow writes have landed, for a point defined as "after the write")."""
    wanted = os.environ.get(VARIABLE)
    if not wanted:
        return
    point, _, nth = wanted.partition(":")
    if point != name:
        return
    _reached[name] += 1
    if _reached[name] >= int(nth or 1):
        once = os.environ.get(ONCE_VARIABLE)
        if once:
            try:
                os.close(os.open(once, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
            except FileExistsError:
                return
        if before is not None:
            before()
        os.kill(os.getpid(), signal.SIGKILL)
