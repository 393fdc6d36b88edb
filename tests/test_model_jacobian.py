"""The analytic Jacobian of every relation agrees with central finite differences.

Reference: the residual functions themselves, differentiated numerically
(central differences, step 1e-5 relative); the property derivatives inside
come from thermodynamic identities (dh = T ds + v dp) and IF97 differences.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.model_helpers import demo_design
from twin.model.solve import off_design_specs, solve_off_design


def _fd_jacobian(fs, z, kwargs, cols):
    J = np.zeros((len(fs.evaluate(z, **kwargs).values), len(cols)))
    for k, c in enumerate(cols):
        step = 1e-5 * max(abs(z[c]), 1.0)
        zp, zm = z.copy(), z.copy()
        zp[c] += step
        zm[c] -= step
        J[:, k] = (fs.evaluate(zp, **kwargs).residuals() - fs.evaluate(zm, **kwargs).residuals()) / (2 * step)
    return J


@pytest.mark.parametrize("load", [1.0, 0.7])
def test_jacobian_matches_finite_differences(load):
    fs, op, design = demo_design()
    hb = design if load == 1.0 else solve_off_design(fs, op, design, load, "sliding")
    kwargs = {"specs": off_design_specs(fs, op, load, "sliding"), "constants": design.constants}
    # a state slightly off the solution, so residuals are not all zero
    rng = np.random.default_rng(7)
    z = hb.z * (1 + 1e-4 * rng.standard_normal(hb.z.size))
    rows = fs.evaluate(z, **kwargs)
    J = rows.jacobian(fs.n_vars).toarray()
    scales = np.asarray(rows.scales)[:, None]
    cols = np.arange(fs.n_vars)
    J_fd = _fd_jacobian(fs, z, kwargs, cols)
    col_scale = np.maximum(np.abs(z), 1.0)[None, :]
    # error relative to the entry itself or, for tiny entries, to the row/column scales
    err = np.abs(J - J_fd) / np.maximum(np.abs(J_fd), 1e-3 * scales / col_scale)
    worst = np.unravel_index(np.argmax(err), err.shape)
    assert err.max() < 1e-4, (rows.names[worst[0]], fs.layout.name_of(int(worst[1])), J[worst], J_fd[worst])
