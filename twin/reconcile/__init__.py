"""twin.reconcile: generic weighted-least-squares data reconciliation (numpy/scipy only).

- :func:`reconcile_linear`: closed form for ``A x + B u = c`` (projection by pivoted QR).
- :func:`reconcile`: nonlinear ``f(z) = 0`` by successive linearisation (Gauss-Newton SQP).
- :meth:`Result.functional_covariance`: covariance of linear functionals ``G z`` (KPI
  gradients) from the final KKT factorisation (:mod:`twin.reconcile.covariance`); with
  ``SolveOptions(covariance="diagonal")`` the solve keeps only the measured variances.
- :func:`classify`: redundancy of measurements, observability of unmeasured variables.
- :mod:`twin.reconcile.stats`: global and measurement tests, GLR, detection power, MDB,
  uncertainty of derived quantities.
- :func:`eliminate_suspects`: bounded serial elimination of suspect measurements.
- :func:`synthetic_network`: random metering networks for benchmarks.
"""

from twin.reconcile.elimination import (
    EliminatedMeasurement,
    Elimination,
    Readmitted,
    eliminate_again,
    eliminate_suspects,
    eliminate_suspects_linear,
    readmit,
)
from twin.reconcile.linear import (
    DEFAULT_RANK_TOL,
    REDUNDANCY_FLOOR,
    Classification,
    InconsistentConstraintsError,
    LinearResult,
    classify,
    reconcile_linear,
)
from twin.reconcile.nonlinear import (
    ConstraintSystem,
    LinearSystem,
    Result,
    SolveOptions,
    reconcile,
)
from twin.reconcile.stats import (
    VDI_CRITICAL,
    chi2_quantile,
    chi2_sf,
    derived_uncertainty,
    detection_power,
    global_test,
    glr_bias,
    measurement_test,
    minimum_detectable_bias,
    numerical_gradient,
    sidak_critical,
)
from twin.reconcile.synthetic import SyntheticNetwork, synthetic_network

__all__ = [
    "DEFAULT_RANK_TOL",
    "REDUNDANCY_FLOOR",
    "VDI_CRITICAL",
    "Classification",
    "ConstraintSystem",
    "EliminatedMeasurement",
    "Elimination",
    "InconsistentConstraintsError",
    "LinearResult",
    "LinearSystem",
    "Readmitted",
    "Result",
    "SolveOptions",
    "SyntheticNetwork",
    "chi2_quantile",
    "chi2_sf",
    "classify",
    "derived_uncertainty",
    "detection_power",
    "eliminate_again",
    "eliminate_suspects",
    "eliminate_suspects_linear",
    "global_test",
    "glr_bias",
    "measurement_test",
    "minimum_detectable_bias",
    "numerical_gradient",
    "readmit",
    "reconcile",
    "reconcile_linear",
    "sidak_critical",
    "synthetic_network",
]
