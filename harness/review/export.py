"""One row per configuration of a sweep run, for a spreadsheet or a notebook (`harness export`).

The run is the one `harness report` and `harness cite` describe (``harness.track.readback.sweep_record``): the
sweep's newest run whatever its status, or the run given by id; a run whose trials failed is exported with
its status in every row (``sweep_status``) and its failed configurations, as the report lists them.
The rows are the sweep run's configuration runs as MLflow holds them: the settings (params) as columns,
then every metric the configuration run carries (each score's mean over seeds, its standard deviation,
interval, valid seeds, the rank and tie flag, the length measures, the stage seconds), then the
``harness.*`` tags that describe the evidence. Nothing is recomputed; metrics are exported generically, so
a score added later is exported without touching this module.
"""

from __future__ import annotations

import math
import os
import uuid
from pathlib import Path
import pandas as pd

from harness.errors import HarnessError

FORMATS = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}
IDENTITY = ("sweep", "sweep_run_id", "sweep_status", "dataset", "configuration", "run_id")
LEADING_METRICS = ("rank", "tied_with_leader")
# Tags about the machine or the run's bookkeeping, not about the result.
SKIPPED_TAGS = frozenset({"harness.kind", "harness.host", "harness.pid", "harness.traceback"})


def configuration_table(record) -> pd.DataFrame:
    """The configurations of a sweep record (``harness.track.readback.SweepRecord``), best first within each dataset."""
    rows = []
    for configuration in record.configurations:
        row = {"sweep": record.name, "sweep_run_id": record.run_id, "sweep_status": record.status,
               "dataset": configuration.dataset, "configuration": configuration.name, "run_id": configuration.run_id}
        row.update({f"param.{k}" if k in IDENTITY else k: v for k, v in configuration.params.items() if k != "dataset"})
        row.update({f"metric.{k}" if k in row else k: v for k, v in configuration.metrics.items()})
        row.update({k: v for k, v in configuration.tags.items() if k.startswith("harness.") and k not in SKIPPED_TAGS})
        rows.append(row)
    if not rows:
        return pd.DataFrame(columns=list(IDENTITY))
    params = sorted({k for c in record.configurations for k in c.params if k != "dataset"})
    metrics = sorted({k for c in record.configurations for k in c.metrics},
                     key=lambda m: (m not in LEADING_METRICS, LEADING_METRICS.index(m) if m in LEADING_METRICS else 0, m))
    tags = sorted({k for row in rows for k in row if k.startswith("harness.")})
    columns = list(dict.fromkeys([*IDENTITY, *params, *metrics, *tags, *(k for row in rows for k in row)]))
    table = pd.DataFrame(rows).reindex(columns=columns)
    rank = table["rank"] if "rank" in table else pd.Series(math.inf, index=table.index)
    order = table.assign(_rank=pd.to_numeric(rank, errors="coerce").fillna(math.inf)).sort_values(
        ["dataset", "_rank", "configuration"], kind="stable").index
    return table.loc[order].reset_index(drop=True)


def export_format(path: Path) -> str:
    file_format = FORMATS.get(path.suffix.lower())
    if file_format is None:
        raise HarnessError(f"--to: {path.name}: expected a file name ending in {', '.join(FORMATS)}")
    return file_format


def write_table(table: pd.DataFrame, path: Path) -> None:
    """Write atomically: a temporary file in the same folder, renamed over the target when complete."""
    file_format = export_format(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}.tmp")
    try:
        if file_format == "csv":
            table.to_csv(temporary, index=False)
        else:
            table.to_parquet(temporary, index=False)
        os.replace(temporary, path)
    except OSError as err:
        raise HarnessError(f"--to: cannot write {path}: {err.strerror or err}") from None
    finally:
        temporary.unlink(missing_ok=True)
