"""Window statistics from history samples, as the live tag store computes them."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from twin.history import Samples
from twin.ingest.store import WindowStats


def _tag_stats(tg: np.ndarray, vg: np.ndarray, tb: np.ndarray, ends: np.ndarray, width: float,
               held_from: np.ndarray, max_age: float) -> list[WindowStats]:
    """:meth:`twin.ingest.store.TagStore.window` of one tag over ``[t_end - width, t_end)`` for every end.

    On time-sorted good (``tg``, ``vg``) and bad (``tb``) sample times. The
    windows are cut with one ``searchsorted`` per bound; windows holding the
    same number of samples are reduced together as the rows of one array, row
    by row the same floating-point operations as the tag store's 1-D reductions
    on each window (numpy sums each contiguous row pairwise, as it sums a 1-D
    slice), so the statistics are equal to the bit (tested).
    """
    hi = np.searchsorted(tg, ends, "left")
    lo = np.searchsorted(tg, ends - width, "left")
    n_bad = np.searchsorted(tb, ends, "left") - np.searchsorted(tb, ends - width, "left")
    count = hi - lo
    newest = tg[np.maximum(hi - 1, 0)] if len(tg) else np.zeros(len(ends))
    held = (hi > 0) & (newest >= held_from)
    last_time = np.where(held, newest, math.nan)
    age = np.where(held, ends - last_time, math.inf)
    mean, std, mn, mx = (np.full(len(ends), math.nan) for _ in range(4))
    for c in np.unique(count[count > 0]).tolist():
        rows = np.flatnonzero(count == c)
        x = vg[lo[rows, None] + np.arange(c)]
        mean[rows], mn[rows], mx[rows] = x.mean(axis=1), x.min(axis=1), x.max(axis=1)
        if c > 1:
            std[rows] = x.std(axis=1, ddof=1)
    stale = (age > max_age).tolist()
    return [WindowStats(*f) for f in zip(mean.tolist(), std.tolist(), count.tolist(), n_bad.tolist(),
                                         last_time.tolist(), age.tolist(), mn.tolist(), mx.tolist(), stale,
                                         strict=True)]


def window_inputs(samples: Samples, tags: Sequence[str], ends: np.ndarray, window: float, cycle: float,
                  max_age: Sequence[float], gate_tags: Sequence[str],
                  lookback: float) -> list[tuple[float, dict[str, WindowStats], dict[str, WindowStats]]]:
    """Per window end: (t_end, stats by tag, gate stats), as the daemon computes them from its tag store.

    ``stats`` follow :meth:`twin.ingest.store.TagStore.window` over
    ``[t_end - window, t_end)``; the gate statistics are over the last cycle
    ``[t_end - cycle, t_end)`` (the steady-state key signals only). A sample
    counts as held for staleness when it is at most ``lookback`` seconds
    before the window start (the live ring holds the newest samples).
    """
    order = np.lexsort((samples.t, samples.tag))
    tag_sorted = samples.tag[order]
    bounds = np.searchsorted(tag_sorted, np.arange(len(tags) + 1))
    per_tag = []
    for i in range(len(tags)):
        sl = order[bounds[i]:bounds[i + 1]]
        t, v, ok = samples.t[sl], samples.value[sl], samples.ok[sl]
        per_tag.append((t[ok], v[ok], t[~ok]))
    gate_idx = [(tags.index(g), g) for g in gate_tags if g in tags]
    ends = np.asarray(ends, dtype=float)
    held_from = ends - window - lookback
    by_tag = [_tag_stats(*per_tag[i], ends, window, held_from, max_age[i]) for i in range(len(tags))]
    by_gate = [(tag, _tag_stats(*per_tag[i], ends, cycle, held_from, max_age[i])) for i, tag in gate_idx]
    out = []
    for k, t_end in enumerate(ends.tolist()):
        stats = {tag: by_tag[i][k] for i, tag in enumerate(tags)}
        gate = {tag: g[k] for tag, g in by_gate}
        out.append((t_end, stats, gate))
    return out

