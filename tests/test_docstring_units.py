"""Every public physics function documents the unit of each physical parameter (STYLE habit 2).

Scope: public functions, and public methods of public classes, in
``twin/properties/*.py``, ``twin/model/*.py`` and ``twin/performance/kpi.py``.

The rule, read from the source with :mod:`ast` (nothing is imported):

* A parameter is *physical* when its name says so (:func:`is_physical`): the
  canonical names (``pressure``, ``temperature``, ``mass_flow``, ``enthalpy``,
  ``entropy``, ``quality``, ``load``...), the one-letter state symbols
  (``p``, ``T``, ``h``, ``s``, ``v``, ``x``, ``y``, ``m``) alone or with a
  suffix (``p_out``, ``h_in``), and names containing a quantity word
  (``..._flow``, ``..._power``, ``..._efficiency``...). Containers of
  variables (``z``), equipment, contexts, options and labels (``..._mode``,
  ``..._id``) are not physical.
* Each physical parameter is documented with one unit in brackets, in SI
  notation from :data:`UNITS`, either in the description of its numpydoc
  ``Parameters`` entry (``cw_in, cw_out : float`` / ``...temperature [K]``) or,
  in a docstring without that section, right after its name in the text
  (``pressure p [Pa]``, ```load`` (main-steam flow / design flow) [-]``,
  ```m`` is the exhaust mass flow [kg/s]``).
  Constructor parameters may be documented in the class docstring.
* A module-level delegate without a docstring whose body is only
  ``return water().<same name>(...)`` is covered by the documented method it
  calls, which is checked.
"""

from __future__ import annotations

import ast
import re
from dataclasses import dataclass
from pathlib import Path

import pytest

import twin

PACKAGE_DIR = Path(twin.__file__).parent
MODEL_FILES = sorted(str(p.relative_to(PACKAGE_DIR)) for p in (PACKAGE_DIR / "model").glob("*.py"))
PROPERTY_FILES = sorted(str(p.relative_to(PACKAGE_DIR)) for p in (PACKAGE_DIR / "properties").glob("*.py"))
FILES = [*PROPERTY_FILES, *MODEL_FILES, "performance/kpi.py"]

# The one notation (SI base units, "m3" not "m³", "J/(kg K)" not "J/kgK").
UNITS = frozenset(
    {
        "Pa",
        "K",
        "J/kg",
        "J/(kg K)",
        "m3/kg",
        "kg/m3",
        "kg/s",
        "W",
        "W/K",
        "W/(m2 K)",
        "K/W",
        "m2",
        "m/s",
        "s",
        "-",
    }
)

CANONICAL = frozenset(
    {
        "pressure",
        "temperature",
        "mass_flow",
        "enthalpy",
        "entropy",
        "quality",
        "isentropic_efficiency",
        "efficiency",
        "load",
        "power",
        "duty",
        "ua",
        "u_clean",
    }
)
STATE_SYMBOL = re.compile(r"^(p|T|h|s|v|x|y|m)(_[A-Za-z0-9]+)?$")
QUANTITY_WORD = re.compile(
    r"(pressure|temperature|enthalpy|entropy|flow|power|duty|efficiency|quality|moisture"
    r"|^cw_|_ttd$|_dca$)"
)


NOT_PHYSICAL_SUFFIX = ("_mode", "_name", "_id", "_column", "_columns")


def is_physical(name: str) -> bool:
    if name.endswith(NOT_PHYSICAL_SUFFIX):
        return False  # a label or an index, not a quantity (``pressure_mode``)
    return name in CANONICAL or bool(STATE_SYMBOL.match(name)) or bool(QUANTITY_WORD.search(name))


@dataclass(frozen=True)
class Finding:
    where: str  # file:line qualified.name
    parameter: str
    problem: str

    def __str__(self) -> str:
        return f"{self.where}: parameter {self.parameter!r} {self.problem}"


def _numpydoc_parameters(doc: str) -> dict[str, str] | None:
    """Parameter name -> description text of a numpydoc ``Parameters`` section, or None."""
    lines = doc.splitlines()
    for i in range(len(lines) - 1):
        if lines[i].strip() == "Parameters" and set(lines[i + 1].strip()) == {"-"}:
            break
    else:
        return None
    out: dict[str, str] = {}
    names: list[str] = []
    for j in range(i + 2, len(lines)):
        line = lines[j]
        if line.strip() and j + 1 < len(lines) and set(lines[j + 1].strip()) == {"-"}:
            break  # next section header
        if line.strip() and not line.startswith((" ", "\t")):
            head = line.split(" : ")[0]
            names = [n.strip().lstrip("*") for n in head.split(",")]
            for n in names:
                out[n] = line.split(" : ", 1)[1] if " : " in line else ""
        elif names:
            for n in names:
                out[n] += " " + line.strip()
    return out


def _inline_unit(doc: str, name: str) -> str | None:
    pattern = re.compile(
        rf"(?<![\w.`])``?{re.escape(name)}``?(?![\w(])|(?<![\w.`]){re.escape(name)}(?![\w(`])"
    )
    for match in pattern.finditer(doc):
        rest = doc[match.end() :]
        # "name [u]", "name (note) [u]" or "name is the ... [u]" within one clause
        unit = re.match(r"(?:\s+is\s[^\[\];\n]{0,80}?)?\s*(?:\([^()\n]*\)\s*)?\[([^\]\n]+)\]", rest)
        if unit:
            return unit.group(1)
    return None


def _unit_of(docs: list[str], name: str) -> str | None:
    for doc in docs:
        params = _numpydoc_parameters(doc)
        if params is not None and name in params:
            units = re.findall(r"\[([^\]]+)\]", params[name])
            return units[0] if units else None
    for doc in docs:
        unit = _inline_unit(doc, name)
        if unit is not None:
            return unit
    return None


def _is_delegate(fn: ast.FunctionDef) -> bool:
    """``def f(...): return water().f(...)`` with no docstring."""
    if ast.get_docstring(fn) or len(fn.body) != 1 or not isinstance(fn.body[0], ast.Return):
        return False
    call = fn.body[0].value
    return (
        isinstance(call, ast.Call)
        and isinstance(call.func, ast.Attribute)
        and call.func.attr == fn.name
        and isinstance(call.func.value, ast.Call)
        and isinstance(call.func.value.func, ast.Name)
        and call.func.value.func.id == "water"
    )


def check_source(path: str, text: str) -> tuple[list[Finding], int]:
    """Findings for one file and the number of physical parameters checked."""
    findings: list[Finding] = []
    checked = 0

    def check(fn: ast.FunctionDef, qualname: str, extra_docs: list[str]) -> None:
        nonlocal checked
        if fn.name.startswith("_") and fn.name != "__init__":
            return
        if _is_delegate(fn):
            return
        args = fn.args.posonlyargs + fn.args.args + fn.args.kwonlyargs
        physical = [a.arg for a in args if a.arg not in ("self", "cls") and is_physical(a.arg)]
        docs = [d for d in [ast.get_docstring(fn) or "", *extra_docs] if d]
        for name in physical:
            checked += 1
            where = f"{path}:{fn.lineno} {qualname}"
            unit = _unit_of(docs, name)
            if unit is None:
                findings.append(Finding(where, name, "has no [unit] in the docstring"))
            elif unit not in UNITS:
                findings.append(Finding(where, name, f"has [{unit}], not one of {sorted(UNITS)}"))

    for node in ast.parse(text).body:
        if isinstance(node, ast.FunctionDef):
            check(node, node.name, [])
        elif isinstance(node, ast.ClassDef) and not node.name.startswith("_"):
            class_doc = ast.get_docstring(node) or ""
            for item in node.body:
                if isinstance(item, ast.FunctionDef):
                    extra = [class_doc] if item.name == "__init__" else []
                    check(item, f"{node.name}.{item.name}", extra)
    return findings, checked


def test_every_physical_parameter_documents_its_unit():
    findings: list[Finding] = []
    checked = 0
    for rel in FILES:
        f, n = check_source(f"twin/{rel}", (PACKAGE_DIR / rel).read_text(encoding="utf-8"))
        findings += f
        checked += n
    assert checked >= 40  # the rule found the physics functions it is meant for
    assert not findings, "undocumented units:\n  " + "\n  ".join(map(str, findings))


@pytest.mark.parametrize(
    ("source", "expected"),
    [
        ('def f(p, T):\n    """Enthalpy at pressure p [Pa] and T [K]."""\n', []),
        (
            'def f(p, T):\n    """Enthalpy at pressure p [Pa] and temperature T."""\n',
            ["'T' has no"],
        ),
        ('def f(p):\n    """At pressure p [bar]."""\n', ["'p' has [bar]"]),
        ('def f(ctx, stream, skip):\n    """No physical parameters."""\n', []),
        ('def f(load):\n    """Solve at ``load`` (main-steam flow / design flow) [-]."""\n', []),
        ('def f(m):\n    """Loss.\n\n    ``m`` is the mass flow [kg/s]."""\n', []),
        ('def f(m, p):\n    """Loss; m is the flow; p [Pa]."""\n', ["'m' has no"]),
        (
            'def f(cw_in, cw_out, z):\n    """Thing.\n\n    Parameters\n    ----------\n'
            "    cw_in, cw_out : float\n        Cooling-water temperatures [K].\n"
            '    z : ndarray\n        State.\n    """\n',
            [],
        ),
        (
            'def f(mass_flow):\n    """Thing [W].\n\n    Parameters\n    ----------\n'
            '    mass_flow : float\n        Flow.\n    """\n',
            ["'mass_flow' has no"],
        ),
        ("def _private(p):\n    pass\n", []),
        ("def h_pT(p, T): return water().h_pT(p, T)\n", []),
        ("def h_pT(p, T): return other().h_pT(p, T)\n", ["'p' has no", "'T' has no"]),
        (
            'class C:\n    """State.\n\n    Parameters\n    ----------\n    h : float\n'
            '        Enthalpy [J/kg].\n    """\n\n    def __init__(self, h):\n        pass\n',
            [],
        ),
    ],
)
def test_rule_on_small_examples(source, expected):
    findings, _ = check_source("x.py", source)
    assert len(findings) == len(expected), findings
    for finding, text in zip(findings, expected, strict=True):
        assert text in str(finding)


@pytest.mark.parametrize(
    ("name", "physical"),
    [
        ("p", True),
        ("T", True),
        ("h_in", True),
        ("p_gen", True),
        ("mass_flow", True),
        ("reference_flow", True),
        ("cw_in", True),
        ("load", True),
        ("ctx", False),
        ("stream", False),
        ("z", False),
        ("settings", False),
        ("table", False),
        ("pressure_mode", False),
    ],
)
def test_physical_parameter_names(name, physical):
    assert is_physical(name) is physical
