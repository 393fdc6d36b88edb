"""twin.monitor: steady-state detection, drift charts and alarm state machines.

Pure state objects driven by window values and window time (numpy only, no
clock, no I/O); the orchestrator owns their state.
"""

from twin.monitor.alarms import (
    ACTIVE,
    CLEARING,
    HIGH,
    LOW,
    NORMAL,
    PENDING,
    STATES,
    SUPPRESSED,
    UNAVAILABLE,
    GradedAlarm,
    Level,
    LevelAlarm,
    SuspectTracker,
    ThresholdAlarm,
    Transition,
    exhaust_moisture_alarm,
    suppression_reason,
)
from twin.monitor.drift import (
    DriftBank,
    DriftMonitor,
    DriftSettings,
    DriftStatus,
    cusum_step,
    ewma_halfwidth,
    ewma_step,
)
from twin.monitor.steady import (
    INSUFFICIENT_DATA,
    STEADY,
    TRANSIENT,
    RStatistic,
    SteadyStateDetector,
    SteadyVerdict,
    r_statistic_series,
)

__all__ = [
    "ACTIVE",
    "CLEARING",
    "HIGH",
    "INSUFFICIENT_DATA",
    "LOW",
    "NORMAL",
    "PENDING",
    "STATES",
    "STEADY",
    "SUPPRESSED",
    "TRANSIENT",
    "UNAVAILABLE",
    "DriftBank",
    "DriftMonitor",
    "DriftSettings",
    "DriftStatus",
    "GradedAlarm",
    "Level",
    "LevelAlarm",
    "RStatistic",
    "SteadyStateDetector",
    "SteadyVerdict",
    "SuspectTracker",
    "ThresholdAlarm",
    "Transition",
    "cusum_step",
    "ewma_halfwidth",
    "ewma_step",
    "exhaust_moisture_alarm",
    "r_statistic_series",
    "suppression_reason",
]
