"""The targeting pipeline's outputs: the priority-rank raster, the patch table and the summary."""

from __future__ import annotations

from envelope.io.atomic import atomic_output, check_writable
from envelope.io.writing import write_raster
from envelope.provenance import json_text
from envelope.targeting import RANK_NODATA, TargetResult

__all__ = ["write_target_outputs"]


def write_target_outputs(result: TargetResult, out, table_path, summary_path, *, overwrite=False, tags=None) -> dict:
    """Write the rank raster, the patch table (CSV) and the summary JSON; all checked first, each atomic."""
    for p in (out, table_path, summary_path):
        check_writable(p, overwrite)
    write_raster(result.rank, out, overwrite=overwrite, nodata=RANK_NODATA,
                 tags={**(tags or {}), "meaning": "restoration priority rank (1 = first); 0 = not chosen"})
    with atomic_output(table_path, overwrite=overwrite) as tmp:
        result.table.to_csv(tmp, index=False)
    with atomic_output(summary_path, overwrite=overwrite) as tmp:
        tmp.write_text(json_text(result.summary))
    return {"priority": str(out), "table": str(table_path), "summary": str(summary_path)}
