"""Imports inside ``twin/`` go one way: down the layer order, never up or sideways.

Every module under ``twin/`` is parsed with :mod:`ast` (imports inside functions
and under ``if TYPE_CHECKING:`` count too) and checked against the layer table
below (DESIGN.md "Package layout"). Also checked: each third-party library that
must enter through one module is imported by that module only, and the pure
packages (``twin.reconcile``, ``twin.monitor``) import nothing from twin but
themselves. Dynamic imports by name (``importlib.import_module`` in the command
dispatchers) are not import statements and are not checked.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path

import pytest

import twin

PACKAGE_DIR = Path(twin.__file__).parent
ROOT = "twin"

# Top to bottom. "x.*" is the package x and everything under it; a bare name is
# one module. A module may import from its own package or from lower layers.
LAYERS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("L9 commands", ("twin.cli", "twin.commands.*", "twin.bench.*")),
    ("L8 orchestrators", ("twin.daemon", "twin.backfill.*", "twin.demo.*")),
    ("L7b cycle", ("twin.cycle",)),
    ("L7 adapters", ("twin.mqtt.*", "twin.sparkplug", "twin.metrics.*", "twin.history.*", "twin.ingest.*",
                     "twin.diagram", "twin.state")),
    ("L6 monitor", ("twin.monitor.*",)),
    ("L5 performance", ("twin.performance.*",)),
    ("L4 reconcile", ("twin.reconcile.*",)),
    ("L3 model", ("twin.model.*",)),
    ("L2 properties", ("twin.properties.*",)),
    # twin._sparkplug_schema: generated data (the Sparkplug B descriptor), no imports
    ("L1 foundation", ("twin.config.*", "twin.units", "twin.kinds", "twin.result", "twin._sparkplug_schema",
                       "twin")),
)

# Same-layer imports between different packages that the design asks for.
SIDEWAYS_ALLOWED: dict[tuple[str, str], str] = {
    ("twin.config", "twin.units"): "the schema converts plant units to SI once, at load",
    ("twin.config", "twin.kinds"): "the schema validates equipment against the kinds table",
    ("twin.cli", "twin.commands"): "one help style for every command (twin.commands._text)",
    ("twin.ingest", "twin.sparkplug"): "the ingest decodes Sparkplug B payloads through the protobuf gateway",
}

# Packages that import nothing from twin except themselves.
ISOLATED: tuple[str, ...] = ("twin.reconcile", "twin.monitor")

# Third-party library (top-level import name) -> the one module that may import it.
GATEWAYS: dict[str, str] = {
    "CoolProp": "twin.properties.backend",
    "paho": "twin.mqtt.*",
    "google": "twin.sparkplug",  # protobuf (google.protobuf)
    "prometheus_client": "twin.metrics.*",
    "pydantic": "twin.config.*",
    "amqtt": "twin.demo._broker_main",
    "matplotlib": "twin.diagram",
    "pyarrow": "twin.history.*",
    "isal": "twin.history.*",
    "distributed": "twin.backfill.*",
    "dask": "twin.backfill.*",
}


@dataclass(frozen=True)
class Layer:
    index: int  # 0 = top
    label: str
    group: str  # the package (for "x.*") or the module itself


@dataclass(frozen=True)
class ImportRef:
    module: str  # importing module
    path: str  # file, relative to the repository
    line: int
    text: str  # the import statement as written
    target: str  # imported module (twin.*) or top-level third-party name


def _matches(name: str, pattern: str) -> str | None:
    if pattern.endswith(".*"):
        pkg = pattern[:-2]
        return pkg if name == pkg or name.startswith(pkg + ".") else None
    return pattern if name == pattern else None


def layer_of(name: str) -> Layer | None:
    """The layer of a twin module name, or None if the table does not place it."""
    for index, (label, patterns) in enumerate(LAYERS):
        for pattern in patterns:
            group = _matches(name, pattern)
            if group is not None:
                return Layer(index, label, group)
    return None


def _in_package(name: str, pkg: str) -> bool:
    return name == pkg or name.startswith(pkg + ".")


def module_name(path: Path, package_dir: Path = PACKAGE_DIR) -> str:
    parts = list(path.relative_to(package_dir.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _resolve_from(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def collect_imports(sources: dict[str, tuple[str, str, bool]], known: set[str]) -> list[ImportRef]:
    """Every import in ``sources`` (module -> (path, source text, is_package)).

    ``from a import b`` targets ``a.b`` when that is a known twin module, else ``a``.
    Third-party targets are reduced to their top-level name.
    """
    refs: list[ImportRef] = []
    for module, (path, text, is_package) in sorted(sources.items()):
        lines = text.splitlines()
        for node in ast.walk(ast.parse(text, filename=path)):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = _resolve_from(module, is_package, node)
                if base == "__future__":
                    continue
                targets = [
                    f"{base}.{a.name}" if f"{base}.{a.name}" in known else base for a in node.names
                ]
            else:
                continue
            stmt = lines[node.lineno - 1].strip()
            for target in dict.fromkeys(targets):
                if not _in_package(target, ROOT):
                    target = target.split(".")[0]
                refs.append(ImportRef(module, path, node.lineno, stmt, target))
    return refs


def violations(refs: list[ImportRef], modules: set[str]) -> list[str]:
    """Human-readable layering and gateway violations, one per offending import."""
    found: list[str] = []
    for m in sorted(modules):
        if layer_of(m) is None:
            found.append(
                f"{m}: not placed in any layer; add it to LAYERS in tests/test_layering.py"
            )
    for r in refs:
        where = f"{r.path}:{r.line}: {r.module} `{r.text}`"
        if not _in_package(r.target, ROOT):
            gate = GATEWAYS.get(r.target)
            if gate is not None and _matches(r.module, gate) is None:
                found.append(f"{where}: {r.target} may be imported only by {gate}")
            continue
        iso = next((p for p in ISOLATED if _in_package(r.module, p)), None)
        if iso is not None and not _in_package(r.target, iso):
            found.append(f"{where}: {iso} imports nothing from twin, found {r.target}")
            continue
        src, dst = layer_of(r.module), layer_of(r.target)
        if src is None:
            continue  # reported above
        if dst is None:
            found.append(f"{where}: imports {r.target}, which is in no layer")
        elif dst.index < src.index:
            found.append(f"{where}: upward import of {r.target} ({src.label} -> {dst.label})")
        elif (
            dst.index == src.index
            and dst.group != src.group
            and (src.group, dst.group) not in SIDEWAYS_ALLOWED
        ):
            found.append(f"{where}: sideways import of {r.target} within {src.label}")
    return found


def _twin_sources() -> dict[str, tuple[str, str, bool]]:
    out = {}
    for path in sorted(PACKAGE_DIR.rglob("*.py")):
        rel = str(path.relative_to(PACKAGE_DIR.parent))
        out[module_name(path)] = (rel, path.read_text(encoding="utf-8"), path.name == "__init__.py")
    return out


@pytest.fixture(scope="module")
def twin_imports() -> tuple[dict[str, tuple[str, str, bool]], list[ImportRef]]:
    sources = _twin_sources()
    return sources, collect_imports(sources, set(sources))


def test_twin_imports_follow_the_layer_order(twin_imports):
    sources, refs = twin_imports
    found = violations(refs, set(sources))
    assert not found, "layering violations:\n  " + "\n  ".join(found)


def test_walker_sees_top_level_and_function_local_imports(twin_imports):
    # Guards the check above against passing vacuously.
    sources, refs = twin_imports
    assert len(sources) >= 40
    pairs = {(r.module, r.target) for r in refs}
    assert ("twin.properties.backend", "CoolProp") in pairs  # module level
    assert ("twin.demo._broker_main", "amqtt") in pairs  # inside a function
    assert ("twin.config.checks", "twin.kinds") in pairs  # `from twin import kinds`
    assert ("twin.model.flowsheet", "twin.properties") in pairs


def _check(files: dict[str, str]) -> list[str]:
    sources = {m: (m.replace(".", "/") + ".py", text, False) for m, text in files.items()}
    known = set(sources) | {
        "twin.model.solve",
        "twin.performance.kpi",
        "twin.units",
        "twin.metrics",
    }
    return violations(collect_imports(sources, known), set(sources))


@pytest.mark.parametrize(
    ("module", "source", "expected"),
    [
        ("twin.model.flow", "def f():\n    from twin.performance.kpi import x\n", "upward import"),
        ("twin.mqtt", "import twin.metrics\n", "sideways import"),
        ("twin.history", "from twin import metrics\n", "sideways import"),
        ("twin.reconcile.linear", "from twin.units import K\n", "imports nothing from twin"),
        ("twin.monitor.drift", "from twin.model.solve import x\n", "imports nothing from twin"),
        ("twin.model.core", "import CoolProp.CoolProp as CP\n", "only by twin.properties"),
        ("twin.daemon", "from paho.mqtt import client\n", "only by twin.mqtt"),
        ("twin.cli", "import pydantic\n", "only by twin.config"),
        (
            "twin.demo.simulator",
            "from amqtt.broker import Broker\n",
            "only by twin.demo._broker_main",
        ),
        ("twin.daemon", "import prometheus_client\n", "only by twin.metrics"),
        ("twin.units", "from twin.config import load_config\n", "sideways import"),
        ("twin.gadgets", "import math\n", "not placed in any layer"),
    ],
)
def test_checker_flags_each_kind_of_violation(module, source, expected):
    found = _check({module: source})
    assert len(found) == 1 and expected in found[0], found
    if "not placed" not in expected:
        assert f"{module.replace('.', '/')}.py:" in found[0]  # file and line in the message


@pytest.mark.parametrize(
    ("module", "source"),
    [
        ("twin.performance.kpi", "from twin.model.solve import x\nfrom twin.result import y\n"),
        ("twin.model.flow", "from twin.model.core import Rows\n"),  # same package
        ("twin.metrics", "from twin import __version__\nimport prometheus_client\n"),
        ("twin.config", "from twin import units\nimport pydantic\n"),  # allowed sideways
        ("twin.reconcile.kkt", "from twin.reconcile.linear import x\nimport scipy.sparse\n"),
        ("twin.model.solve", "from . import flowsheet\nfrom .core import Rows\n"),  # relative
    ],
)
def test_checker_accepts_downward_and_same_package_imports(module, source):
    assert _check({module: source}) == []


def test_relative_imports_resolve_to_absolute_names():
    sources = {
        "twin.model.solve": ("twin/model/solve.py", "from ..performance import kpi\n", False)
    }
    refs = collect_imports(sources, {"twin.performance.kpi"})
    assert [r.target for r in refs] == ["twin.performance.kpi"]
    assert "upward import" in violations(refs, {"twin.model.solve"})[0]
