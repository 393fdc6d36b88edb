"""The fixed Jacobian pattern and the batched stream states give the straightforward numbers.

References: the straightforward evaluation (``Flowsheet.evaluate(fixed_pattern=False)``
through ``twin.bench.reconcile_profile.straightforward_evaluation``: states read lazily
one by one from fresh contexts, the Jacobian from coordinate triplets summed by
``scipy.sparse``, no structure kept between calls) and, for the pattern on its own,
a brute-force dense sum of the written entries.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest
import scipy.sparse as sp

from tests.model_helpers import demo_config, demo_design
from tests.test_evaluation_equivalence import _compare, random_states
from twin.model.core import Rows, SparsityPattern
from twin.performance.plant import PlantSystem


@pytest.fixture
def verify() -> Iterator[None]:
    """Every assembly also compares each entry's row and column with the kept structure."""
    SparsityPattern.verify = True
    try:
        yield
    finally:
        SparsityPattern.verify = False


@pytest.fixture(scope="module")
def system() -> PlantSystem:
    fs, _, design = demo_design()
    return PlantSystem(fs, demo_config().sensors, design)


@pytest.mark.parametrize("n", [100, pytest.param(1000, marks=pytest.mark.slow)])
def test_random_states_match_straightforward_with_layout_check(system, verify, n):
    # to 1e-9 relative, and the guard (counts, row names) never lets a changed layout through,
    # on demo-u1 states spread over ±5 % flow, ±2 % pressure, ±8 kJ/kg (wet, superheated,
    # near saturation)
    assert _compare(system, random_states(system, n, seed=21)) >= 0.9 * n


def _dense(rows: Rows, n: int) -> np.ndarray:
    """Brute force: every written entry added into a dense matrix."""
    r, c, d = rows.entries()
    out = np.zeros((len(rows.values), n))
    for i, j, v in zip(r, c, d, strict=True):
        out[i, j] += v
    return out


def _rows(pattern: SparsityPattern, grads: list[dict[int, float]], extra: tuple = ()) -> Rows:
    rows = Rows(pattern)
    for k, g in enumerate(grads):
        rows.add(f"row{k}", "balance", float(k), g, 1.0)
    for i, j, v in extra:
        rows.add_entry(i, j, v)
    return rows


def test_pattern_scatter_and_rebuild_against_brute_force(verify):
    rng = np.random.default_rng(3)
    pattern = SparsityPattern()
    layout = [{0: 1.0, 3: 2.0}, {2: 1.0, 1: 1.0, 4: 1.0}, {4: 1.0}]
    for _ in range(5):  # same layout, new values: built once, scattered after
        grads = [{c: float(rng.normal()) for c in g} for g in layout]
        rows = _rows(pattern, grads, extra=((1, 4, float(rng.normal())), (0, 5, 1.5)))  # (1, 4) repeated: summed
        J = rows.jacobian(6)
        assert J.has_canonical_format
        np.testing.assert_array_equal(J.toarray(), _dense(rows, 6))
    assert pattern.rebuilds == 1
    # one more entry in a row (a count changes): rebuilt, still right
    rows = _rows(pattern, [{0: 1.0, 3: 2.0, 5: 7.0}, {2: 1.0, 1: 1.0, 4: 1.0}, {4: 1.0}])
    np.testing.assert_array_equal(rows.jacobian(6).toarray(), _dense(rows, 6))
    assert pattern.rebuilds == 2
    # a renamed row with the same counts: rebuilt
    rows = _rows(pattern, [{0: 1.0, 3: 2.0, 5: 7.0}, {2: 1.0, 1: 1.0, 4: 1.0}, {4: 1.0}])
    rows.names[2] = "other"
    np.testing.assert_array_equal(rows.jacobian(6).toarray(), _dense(rows, 6))
    assert pattern.rebuilds == 3


def test_layout_check_catches_what_the_guard_cannot(verify):
    pattern = SparsityPattern()
    _rows(pattern, [{0: 1.0, 3: 2.0}, {1: 1.0}]).jacobian(4)
    moved = _rows(pattern, [{0: 1.0, 2: 2.0}, {1: 1.0}])  # same names and counts, another column
    with pytest.raises(RuntimeError, match="layout changed"):
        moved.jacobian(4)


def test_batched_states_are_the_lazy_ones(system):
    fs = system.fs
    z = system.initial_point(system.design.z)
    z = z * (1.0 + 1e-7 * np.random.default_rng(4).uniform(-1, 1, z.size))
    lazy = fs.context(z, system.constants)
    rows, _ = system._rows(z, lazy)
    fresh = fs.context(z, system.constants)
    fresh.prefetch(range(len(fs.layout.streams)))
    assert set(lazy._ph) <= set(fresh._ph)
    for k, st in lazy._ph.items():
        assert fresh._ph[k] == st  # same numbers, bit for bit (dataclass equality, field by field)
    # the pattern learned every state the evaluation read, sensors' included
    rows.jacobian(system.n_vars)
    assert set(lazy._ph) <= set(rows.pattern.states)  # type: ignore[union-attr]


def test_prefetch_leaves_an_unreadable_state_to_the_equation_that_reads_it(system):
    fs = system.fs
    z = np.array(system.design.z, dtype=float)
    k = 0
    z[3 * k + 2] = -5.0e6  # far below any IF97 liquid enthalpy: no state
    ctx = fs.context(z, {})
    ctx.prefetch(range(len(fs.layout.streams)))
    assert k not in ctx._ph and len(ctx._ph) == len(fs.layout.streams) - 1
    with pytest.raises(ValueError):
        ctx.ph(fs.layout.streams[k])


def test_straightforward_rows_keep_no_pattern(system):
    rows = system.fs.evaluate(system.design.z, constants=system.design.constants, fixed_pattern=False)
    assert rows.pattern is None and rows.context is None
    J = rows.jacobian(system.fs.n_vars)
    assert isinstance(J, sp.csr_matrix)
    np.testing.assert_array_equal(J.toarray(), _dense(rows, system.fs.n_vars))


def test_warm_started_states_match_the_table_started_reference():
    # each stream's state started from its previous temperature (Flowsheet(warm_start=True));
    # reference: the straightforward evaluation, every state from the start table
    from twin.model.flowsheet import Flowsheet

    _, _, design = demo_design()
    fs = Flowsheet.from_config(demo_config(), warm_start=True)
    warm = PlantSystem(fs, demo_config().sensors, design)
    assert _compare(warm, random_states(warm, 100, seed=23)) >= 90
    assert fs.previous_T is not None and sum(t == t for t in fs.previous_T) >= 30  # the states were read warm
