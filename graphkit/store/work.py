"""The stage work folders under ``STORE/work/``: removing those of runs that never finished."""

from __future__ import annotations

import shutil
import time
from pathlib import Path

__all__ = ["clean_work", "WORK_PREFIXES"]


#: The stage folders :func:`graphkit.pipeline.plan_run` names under ``STORE/work/``.
WORK_PREFIXES = ("ingest-", "holdout-", "budget-", "walks-", "train-")


def clean_work(store, *, keep=(), older_than_days: float = 7.0, now: float | None = None) -> list[str]:
    """Remove the stage folders of runs that never finished, once they are older than ``older_than_days``.

    A run killed midway leaves its stage folders so that the next run with the same input and parameters resumes
    from them; when the input or the parameters changed, nothing will ever resume from them. A folder's age is
    its modification time, which every file written directly into it (a walk shard, a marker) refreshes. Only
    folders named like a stage's (:data:`WORK_PREFIXES`) are touched, never ``keep`` (the current run's) nor
    anything that is a symlink. Call it only while holding the run lock. Returns the removed paths.
    """
    work = Path(store) / "work"
    if not work.is_dir():
        return []
    cutoff = (time.time() if now is None else now) - older_than_days * 86400.0
    keep = {Path(k).resolve() for k in keep if k}
    removed = []
    for entry in sorted(work.iterdir()):
        if not entry.name.startswith(WORK_PREFIXES) or entry.is_symlink() or not entry.is_dir():
            continue
        if entry.resolve() in keep or entry.stat().st_mtime > cutoff:
            continue
        shutil.rmtree(entry, ignore_errors=True)
        removed.append(str(entry))
    return removed

