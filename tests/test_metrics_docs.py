"""docs/metrics.md lists exactly the metric families twin exports, with units matching names."""

from __future__ import annotations

import re
from pathlib import Path

from tests.test_deploy import full_health, populated_result
from twin.metrics import MetricsServer

DOC = Path(__file__).resolve().parent.parent / "docs" / "metrics.md"
README = Path(__file__).resolve().parent.parent / "README.md"
ROW = re.compile(r"^\| `(twin_[a-z0-9_]+)` \| ([a-z ()]+) \| ([^|]*) \| (.+) \| ([^|]+) \|$")
UNITS = {
    "_kilograms_per_second": "kg/s",
    "_joules_per_kilogram": "J/kg",
    "_pascals": "Pa (absolute)",
    "_watts": "W",
    "_celsius": "°C",
    "_timestamp_seconds": "s (Unix time)",
    "_seconds": "s",
    "_ratio": "1",
}


def documented(path: Path = DOC) -> dict[str, tuple[str, set[str], str]]:
    rows = {}
    for line in path.read_text().splitlines():
        m = ROW.match(line)
        if m:
            labels = set(re.findall(r"`([a-z_]+)`", m.group(3)))
            rows[m.group(1)] = (m.group(2), labels, m.group(5).strip())
    return rows


def exported() -> dict[str, tuple[str, set[str]]]:
    server = MetricsServer(populated_result, port=0, health=full_health)
    server.observe_cycle(0.1)
    out = {}
    for fam in server.registry.collect():
        name = fam.name + {"counter": "_total", "info": "_info"}.get(fam.type, "")
        labels = {k for s in fam.samples for k in s.labels} - {"le"}
        out[name] = (fam.type, labels)
    return out


def test_every_exported_family_is_documented_and_nothing_else() -> None:
    docs, live = documented(), exported()
    assert sorted(set(live) - set(docs)) == []
    assert sorted(set(docs) - set(live)) == []


def test_documented_type_labels_and_unit_match() -> None:
    docs, live = documented(), exported()
    for name, (typ, labels) in live.items():
        doc_type, doc_labels, doc_unit = docs[name]
        assert doc_type.split()[0] == ("gauge" if typ == "info" else typ), name
        assert doc_labels == labels, name
        base = name.removesuffix("_total")
        want = next((u for suffix, u in UNITS.items() if base.endswith(suffix)), None)
        if want is not None:
            assert doc_unit == want, name


def test_readme_table_lists_the_same_metrics() -> None:
    """The README's metric table is the same table (every metric with its meaning)."""
    assert documented(README) == documented(DOC)
