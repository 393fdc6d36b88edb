"""Historian back-fill: the live per-window cycle over a span of history, in chunks, resumable.

Stages:

1. **Spool** (one pass, main process): every history file is read once in
   blocks (:class:`twin.history.HistoryReader`) and its SI samples are
   appended to the spool files of the chunks whose span (warm-up included)
   they fall in. Memory is bounded by one block.
2. **Chunks** (worker processes, or Dask workers with ``scheduler``): each
   chunk is a run of consecutive windows on the configured cycle grid. Its
   worker computes, per window, the same :class:`twin.ingest.store.WindowStats`
   the live tag store produces (window ``[t_end - window, t_end)``, gate means
   over the last cycle, staleness from the newest good sample held) and feeds
   them to :class:`twin.cycle.UnitCycle` as the daemon does.
3. **Drift pass** (main process): the drift charts over every chunk's drift
   inputs, in time order (:mod:`.drift`).
4. **Assemble**: finished chunks are concatenated in time order into
   ``reconciled.csv``/``.parquet`` and ``events.csv`` (drift transitions merged
   in by time); ``openmetrics/`` holds per chunk its OpenMetrics file and its
   drift charts' file.

Sequential state (steady-state gate, alarm delays, suspect persistence, the
reconciler's warm start): **each chunk starts with a warm-up overlap**. A fresh
cycle object runs the ``warmup`` windows before the chunk and their output is
discarded; the chunk's windows then see monitor states built from the same recent
history as a single sequential pass. The filters and delays forget their start
within the warm-up (steady-gate filters with λ = 0.1 decay as 0.9^n; alarm delays
and suspect persistence are a few windows); the reconciler's warm start differs at
solver tolerance. **Drift charts**, whose state is the whole history, are not run
in the chunks: each chunk records its windows' drift inputs and one sequential
pass over all chunks (:mod:`.drift`) charts them in time order. Chunks are a fixed
grid of the range, so the output does not depend on the number of workers, on
Dask versus local processes, or on interruptions.

Each finished chunk is written to ``DIR/chunks/<id>/`` under a temporary name
and renamed, then recorded in ``DIR/manifest.json`` (rewritten atomically);
a run started again with the same inputs skips recorded chunks. Output bytes
are a function of the inputs only: wall-clock figures (compute time) are not
written, and the reconciler runs without its wall-clock time budget.

Advisory monitoring only: back-filled alarms describe the past; nothing here
trips, interlocks or operates equipment.
Modules: :mod:`.plan` (window grid, chunks), :mod:`.windows` (window statistics),
:mod:`.rows` (CSV rows), :mod:`.openmetrics` (OpenMetrics text), :mod:`.chunk` (the
chunk function run by workers), :mod:`.drift` (the sequential drift pass), :mod:`.run`
(spool, pool or Dask, manifest, assembly).
"""

from __future__ import annotations

from twin.backfill.chunk import (
    _model_for,
    _peak_rss_mb,
    fresh_cycle,
    load_spool,
    run_chunk,
)
from twin.backfill.openmetrics import openmetrics_text
from twin.backfill.plan import BackfillError, ChunkSpec, Plan, make_plan
from twin.backfill.rows import (
    EVENTS_HEADER,
    RECONCILED_COLUMNS,
    RECONCILED_HEADER,
    event_row,
    result_rows,
    rfc3339,
)
from twin.backfill.run import (
    DEFAULT_CHUNK_WINDOWS,
    DEFAULT_WARMUP_WINDOWS,
    FORMATS,
    MANIFEST_VERSION,
    BackfillOptions,
    BackfillSummary,
    Progress,
    backfill,
    output_digest,
)
from twin.backfill.windows import window_inputs

__all__ = [
    "DEFAULT_CHUNK_WINDOWS",
    "DEFAULT_WARMUP_WINDOWS",
    "EVENTS_HEADER",
    "FORMATS",
    "MANIFEST_VERSION",
    "RECONCILED_COLUMNS",
    "RECONCILED_HEADER",
    "BackfillError",
    "BackfillOptions",
    "BackfillSummary",
    "ChunkSpec",
    "Plan",
    "Progress",
    "_model_for",
    "_peak_rss_mb",
    "backfill",
    "event_row",
    "fresh_cycle",
    "load_spool",
    "make_plan",
    "openmetrics_text",
    "output_digest",
    "result_rows",
    "rfc3339",
    "run_chunk",
    "window_inputs",
]
