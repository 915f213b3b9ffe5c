"""Named points where a test can make the process die abruptly, to prove that recovery works.

Set HARNESS_CRASH_AT=point or point:n and the process sends itself SIGKILL the
n-th time (default: the first) it reaches that point. Unset, nothing happens.
"""

from __future__ import annotations

import os
import signal
from collections import Counter

VARIABLE = "HARNESS_CRASH_AT"
POINTS = ("encode_batch", "umap_fit", "between_trials", "mlflow_write", "archive_unpack")
_reached: Counter = Counter()


def crash_point(name: str) -> None:
    wanted = os.environ.get(VARIABLE)
    if not wanted:
        return
    point, _, nth = wanted.partition(":")
    if point != name:
        return
    _reached[name] += 1
    if _reached[name] >= int(nth or 1):
        os.kill(os.getpid(), signal.SIGKILL)
