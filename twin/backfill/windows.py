"""Window statistics from history samples, as the live tag store computes them."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from twin.history import Samples
from twin.ingest.store import WindowStats


def _stats(tg: np.ndarray, vg: np.ndarray, tb: np.ndarray, t_end: float, width: float, held_from: float,
           max_age: float) -> WindowStats:
    """:meth:`twin.ingest.store.TagStore.window` of one tag over ``[t_end - width, t_end)`` on sorted arrays."""
    hi = int(np.searchsorted(tg, t_end, "left"))
    lo = int(np.searchsorted(tg, t_end - width, "left"))
    held = hi > 0 and tg[hi - 1] >= held_from
    n_bad = int(np.searchsorted(tb, t_end, "left") - np.searchsorted(tb, t_end - width, "left"))
    count = hi - lo
    last_time = float(tg[hi - 1]) if held else math.nan
    age = t_end - last_time if held else math.inf
    if count:
        x = vg[lo:hi]
        mean, mn, mx = float(x.mean()), float(x.min()), float(x.max())
        std = float(x.std(ddof=1)) if count > 1 else math.nan
    else:
        mean = std = mn = mx = math.nan
    return WindowStats(mean, std, count, n_bad, last_time, age, mn, mx, age > max_age)


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
    out = []
    for t_end in ends:
        t_end = float(t_end)
        held_from = t_end - window - lookback
        stats = {tag: _stats(*per_tag[i], t_end, window, held_from, max_age[i]) for i, tag in enumerate(tags)}
        gate = {tag: _stats(*per_tag[i], t_end, cycle, held_from, max_age[i]) for i, tag in gate_idx}
        out.append((t_end, stats, gate))
    return out

