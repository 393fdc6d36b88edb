"""OpenMetrics text of back-filled results (input of ``promtool tsdb create-blocks-from openmetrics``)."""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

from twin.result import CycleResult

_SKIPPED = "twin_cycle_result_available"  # a live-endpoint liveness signal, meaningless in history
_FLAG = ("0.0", "1.0")  # a flag's value as _go_float writes it


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


class _TextSink:
    """Receives the samples of :func:`twin.metrics.write_result` and keeps them as text lines.

    Families in first-use order, series in first-use order within their family,
    each series' lines in the order of the results — the grouping OpenMetrics
    requires and :func:`twin.metrics.openmetrics_lines` writes. A series is keyed
    by its metric name and its labels as the caller passes them; its label text
    (sorted by label name, as prometheus-client writes it) is built once.
    """

    def __init__(self) -> None:
        self.families: dict[str, tuple[str, dict[tuple, list[str]]]] = {}  # name -> (header, series)
        self.series: dict[tuple, list[str]] = {}  # (sample name, unit, labels) -> [prefix, lines ...]
        self.unit_id = ""
        self.stamp = ""

    def start(self, result: CycleResult) -> None:
        self.unit_id = result.unit_id
        self.stamp = f" {result.window_end}\n"

    def _new(self, kind: str, family: str, sample: str, doc: str, labels: dict[str, str], key: tuple,
             common: bool = True) -> list[str]:
        fam = self.families.get(family)
        if fam is None:
            fam = self.families[family] = (f"# HELP {family} {_esc(doc)}\n# TYPE {family} {kind}\n", {})
        every = {"unit_id": self.unit_id, **labels} if common else dict(labels)
        text = ",".join(f'{k}="{_esc(v)}"' for k, v in sorted(every.items()))
        lines = [f"{sample}{{{text}}} " if text else f"{sample} "]
        fam[1][key] = lines
        self.series[key] = lines
        return lines

    def gauge(self, name: str, doc: str, value: float, **labels: str) -> None:
        if value is None or not math.isfinite(value):
            return
        key = (name, self.unit_id, *labels.items())
        lines = self.series.get(key) or self._new("gauge", name, name, doc, labels, key)
        v = float(value)
        text = repr(v)  # _go_float for a finite value, inlined (the hot line of the writer)
        if v > 0 and text.find(".") > 6:
            text = _go_float(v)
        lines.append(lines[0] + text + self.stamp)

    def flag(self, name: str, doc: str, value: bool, **labels: str) -> None:
        if name == _SKIPPED:
            return
        key = (name, self.unit_id, *labels.items())
        lines = self.series.get(key) or self._new("gauge", name, name, doc, labels, key)
        lines.append(lines[0] + _FLAG[bool(value)] + self.stamp)

    def counter(self, name: str, doc: str, value: float, **labels: str) -> None:
        key = (name, self.unit_id, *labels.items())
        lines = self.series.get(key) or self._new("counter", name, f"{name}_total", doc, labels, key)
        lines.append(lines[0] + _go_float(float(value)) + self.stamp)

    def enum(self, name: str, doc: str, label: str, current: str, values: Iterable[str], **labels: str) -> None:
        states = list(values)
        if current not in states:
            states.append(current)
        for s in states:
            self.flag(name, doc, s == current, **labels, **{label: s})

    def info(self, name: str, doc: str, values: dict[str, str]) -> None:
        key = (name, "", *values.items())
        lines = self.series.get(key) or self._new("info", name, f"{name}_info", doc, values, key, common=False)
        lines.append(lines[0] + "1.0" + self.stamp)

    def text(self) -> str:
        out: list[str] = []
        for header, series in self.families.values():
            out.append(header)
            for lines in series.values():
                out.extend(lines[1:])
        out.append("# EOF\n")
        return "".join(out)


def openmetrics_text(results: Sequence[CycleResult]) -> str:
    """OpenMetrics text of several results, samples stamped with each window end [s].

    The samples come from the live collector's own description of a result
    (:func:`twin.metrics.write_result`, so the names are the live ones); this
    writer keeps them as text, once per family, series grouped in time order,
    ``# EOF`` at the end — the same text as :func:`twin.metrics.openmetrics_lines`,
    written without prometheus-client's family and sample objects (about 10 ms
    a window less on demo-u1, ≈ 1 700 samples a window).
    """
    from twin.metrics import write_result

    sink = _TextSink()
    for r in sorted(results, key=lambda r: r.window_end):
        if not math.isfinite(r.window_end):
            raise ValueError(f"result of unit {r.unit_id!r} has no finite window_end")
        sink.start(r)
        write_result(sink, r)
    return sink.text()
