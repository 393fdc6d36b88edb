"""OpenMetrics text of back-filled results (input of ``promtool tsdb create-blocks-from openmetrics``)."""

from __future__ import annotations

import math
import operator
from array import array
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np

from twin.metrics import SampleSink
from twin.result import CycleResult

_SKIPPED = "twin_cycle_result_available"  # a live-endpoint liveness signal, meaningless in history


def _go_float(d: float) -> str:
    """A sample value as the Prometheus client writes it (Go's float formatting)."""
    if d == math.inf:
        return "+Inf"
    if d == -math.inf:
        return "-Inf"
    if math.isnan(d):
        return "NaN"
    text = repr(d)
    dot = text.find(".")
    if d > 0 and dot > 6:
        mantissa = f"{text[0]}.{text[1:dot]}{text[dot + 1:]}".rstrip("0.")
        return f"{mantissa}e+{dot - 1:02d}"
    return text


def _esc(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


class OpenMetricsWriter(SampleSink):
    """Receives the samples of :func:`twin.metrics.write_result`, window by window, and writes them as text.

    Families in first-use order, series in first-use order within their family,
    each series' samples in the order of the windows — the grouping OpenMetrics
    requires and :func:`twin.metrics.openmetrics_lines` writes. A series is keyed
    by its metric name and its labels as the caller passes them; its label text
    (sorted by label name, as prometheus-client writes it) is built once. Values
    are kept as packed doubles with the index of their window (12 bytes a sample,
    about 30 MB for a day of 1-minute demo-u1 windows), not as text or result
    objects, so a long chunk does not hold its results in memory.
    """

    def __init__(self) -> None:
        self.families: dict[str, tuple[str, list[_Series]]] = {}  # name -> (header, series)
        self.series: dict[tuple, _Series] = {}
        self.stamps: list[str] = []  # " <window end>\n" per window added
        self.unit_id = ""
        self.k = -1

    def add(self, result: CycleResult) -> None:
        """The samples of one result, stamped with its window end [s] (results in time order)."""
        from twin.metrics import write_result

        self.window(result.unit_id, result.window_end)
        write_result(self, result)

    def window(self, unit_id: str, window_end: float) -> None:
        """Start a window: the samples written next carry its end [s] as their timestamp (windows in time order)."""
        if not math.isfinite(window_end):
            raise ValueError(f"result of unit {unit_id!r} has no finite window_end")
        self.unit_id = unit_id
        self.stamps.append(f" {window_end}\n")
        self.k = len(self.stamps) - 1

    def _new(self, kind: str, family: str, sample: str, doc: str, labels: dict[str, str], key: tuple,
             common: bool = True) -> _Series:
        fam = self.families.get(family)
        if fam is None:
            fam = self.families[family] = (f"# HELP {family} {_esc(doc)}\n# TYPE {family} {kind}\n", [])
        every = {"unit_id": self.unit_id, **labels} if common else dict(labels)
        text = ",".join(f'{k}="{_esc(v)}"' for k, v in sorted(every.items()))
        series = _Series(f"{sample}{{{text}}} " if text else f"{sample} ")
        fam[1].append(series)
        self.series[key] = series
        return series

    def gauge(self, name: str, doc: str, value: float, **labels: str) -> None:
        if value is None or not math.isfinite(value):
            return
        key = (name, self.unit_id, *labels.items())
        series = self.series.get(key) or self._new("gauge", name, name, doc, labels, key)
        series.values.append(value)
        series.windows.append(self.k)

    def flag(self, name: str, doc: str, value: bool, **labels: str) -> None:
        if name == _SKIPPED:
            return
        key = (name, self.unit_id, *labels.items())
        series = self.series.get(key) or self._new("gauge", name, name, doc, labels, key)
        series.values.append(1.0 if value else 0.0)
        series.windows.append(self.k)

    def counter(self, name: str, doc: str, value: float, **labels: str) -> None:
        key = (name, self.unit_id, *labels.items())
        series = self.series.get(key) or self._new("counter", name, f"{name}_total", doc, labels, key)
        series.values.append(value)
        series.windows.append(self.k)

    def info(self, name: str, doc: str, values: dict[str, str]) -> None:
        key = (name, "", *values.items())
        series = self.series.get(key) or self._new("info", name, f"{name}_info", doc, values, key, common=False)
        series.values.append(1.0)
        series.windows.append(self.k)

    def chunks(self) -> Iterator[str]:
        """The text in pieces (one per series), ending ``# EOF``.

        A series' lines are ``prefix + value + stamp``: the ``value + stamp`` parts made by a
        C-level map and joined with the prefix between them (every series has a sample); its
        values go through :func:`repr` where that is Go's formatting too (finite and below
        1e6), through :func:`_go_float` otherwise.
        """
        stamp = self.stamps.__getitem__
        for header, series in self.families.values():
            yield header
            for s in series:
                a = np.frombuffer(s.values, dtype=float)
                texts = list(map(repr, s.values))
                odd = ~(np.isfinite(a) & (a < 1e6))
                if odd.any():
                    for i in np.flatnonzero(odd).tolist():
                        texts[i] = _go_float(float(a[i]))
                p = s.prefix
                yield p + p.join(map(operator.add, texts, map(stamp, s.windows)))
        yield "# EOF\n"

    def write(self, path: str | Path) -> None:
        with open(path, "w", encoding="utf-8") as f:
            f.writelines(self.chunks())

    def text(self) -> str:
        return "".join(self.chunks())


class _Series:
    __slots__ = ("prefix", "values", "windows")

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.values = array("d")
        self.windows = array("i")


def openmetrics_text(results: Sequence[CycleResult]) -> str:
    """OpenMetrics text of several results, samples stamped with each window end [s].

    The samples come from the live collector's own description of a result
    (:func:`twin.metrics.write_result`, so the names are the live ones); the
    same text as :func:`twin.metrics.openmetrics_lines`, written without
    prometheus-client's family and sample objects (see :class:`OpenMetricsWriter`).
    """
    w = OpenMetricsWriter()
    for r in sorted(results, key=lambda r: r.window_end):
        w.add(r)
    return w.text()
