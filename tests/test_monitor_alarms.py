"""Alarm state machines: specification tests with hand-derived transition sequences.

The expected sequences below are worked out by hand from the rules in the
docstring of twin.monitor.alarms (deadband, on/off delays, suppression as in
ISA-18.2 / IEC 62682 practice, from memory).
"""

from __future__ import annotations

import math

import pytest

from twin.monitor.alarms import (
    ACTIVE,
    CLEARING,
    HIGH,
    LOW,
    NORMAL,
    PENDING,
    SUPPRESSED,
    UNAVAILABLE,
    GradedAlarm,
    Level,
    LevelAlarm,
    SuspectTracker,
    ThresholdAlarm,
    exhaust_moisture_alarm,
    suppression_reason,
)

NAN = math.nan


def _feed(alarm, seq, **kw):
    """Feed (time, value) pairs; return (time, old, new) of every transition."""
    out = []
    for t, v in seq:
        out += [(tr.time, tr.old, tr.new) for tr in alarm.update(v, t, **kw)]
    return out


def test_deadband_without_delays():
    a = ThresholdAlarm("p", Level("alarm", set_at=10.0, clear_at=9.0), HIGH)
    seq = [(0, 5.0), (1, 10.0), (2, 9.5), (3, 9.0), (4, 8.9), (5, 9.5), (6, 10.2)]
    # 10.0 sets (>= set); 9.5 and 9.0 sit in the deadband; 8.9 clears (< clear);
    # 9.5 is below set so it stays normal; 10.2 sets again.
    assert _feed(a, seq) == [(1, NORMAL, ACTIVE), (4, ACTIVE, NORMAL), (6, NORMAL, ACTIVE)]


def test_on_and_off_delays_in_window_time():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, on_delay=30.0, off_delay=20.0)
    seq = [
        (0, 11.0),  # pending since 0
        (10, 11.0),
        (20, 9.5),  # back below set before 30 s: normal
        (30, 11.0),  # pending since 30
        (40, 11.0),
        (50, 11.0),
        (60, 11.0),  # held 30 s: active
        (70, 8.0),  # clearing since 70
        (80, 9.5),  # back in the deadband before 20 s: active again
        (90, 8.0),  # clearing since 90
        (100, 8.0),
        (110, 8.0),  # held 20 s: normal
    ]
    assert _feed(a, seq) == [
        (0, NORMAL, PENDING),
        (20, PENDING, NORMAL),
        (30, NORMAL, PENDING),
        (60, PENDING, ACTIVE),
        (70, ACTIVE, CLEARING),
        (80, CLEARING, ACTIVE),
        (90, ACTIVE, CLEARING),
        (110, CLEARING, NORMAL),
    ]
    assert not a.raised


def test_clearing_still_counts_as_raised_and_transition_fields():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, off_delay=60.0)
    (tr,) = a.update(12.5, 100.0)
    assert (tr.alarm, tr.level, tr.old, tr.new, tr.time, tr.value) == (
        "p", "alarm", NORMAL, ACTIVE, 100.0, 12.5,
    )  # fmt: skip
    assert "set threshold" in tr.reason
    a.update(8.0, 110.0)
    assert a.state == CLEARING and a.raised


def test_low_direction_mirrors_high():
    a = ThresholdAlarm("lvl", Level("alarm", set_at=2.0, clear_at=3.0), LOW, on_delay=5.0)
    seq = [(0, 2.5), (1, 2.0), (3, 1.0), (6, 1.5), (7, 2.9), (8, 3.1)]
    assert _feed(a, seq) == [(1, NORMAL, PENDING), (6, PENDING, ACTIVE), (8, ACTIVE, NORMAL)]


def test_suppression_is_a_distinct_state_and_release_reapplies_on_delay():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, on_delay=20.0)
    assert _feed(a, [(0, 11.0), (20, 11.0)]) == [(0, NORMAL, PENDING), (20, PENDING, ACTIVE)]
    trs = a.update(11.0, 30, suppress="plant not steady")
    assert [(t.old, t.new) for t in trs] == [(ACTIVE, SUPPRESSED)]
    assert trs[0].reason == "suppressed: plant not steady"
    # while suppressed nothing changes, whatever the value
    assert _feed(a, [(40, 50.0), (50, 1.0), (60, NAN)], suppress="load low") == []
    # released beyond set: on-delay again from the release time
    assert _feed(a, [(70, 11.0), (80, 11.0), (90, 11.0)]) == [
        (70, SUPPRESSED, PENDING),
        (90, PENDING, ACTIVE),
    ]
    a.update(11.0, 100, suppress="plant not steady")
    assert _feed(a, [(110, 5.0)]) == [(110, SUPPRESSED, NORMAL)]


def test_missing_input_holds_then_becomes_unavailable():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, unavailable_after=30.0)
    a.update(12.0, 0)
    # NaN at 10 and 20 neither sets nor clears; at 40 the gap since 10 is 30 s
    assert _feed(a, [(10, NAN), (20, NAN), (40, NAN), (50, NAN)]) == [(40, ACTIVE, UNAVAILABLE)]
    assert _feed(a, [(60, 8.0)]) == [(60, UNAVAILABLE, NORMAL)]
    # a restored value beyond set with no on-delay goes straight to active
    a.update(NAN, 70)
    a.update(NAN, 100)
    assert a.state == UNAVAILABLE
    assert _feed(a, [(110, 10.5)]) == [(110, UNAVAILABLE, ACTIVE)]


def test_release_from_suppression_with_missing_input():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, unavailable_after=30.0)
    a.update(12.0, 0, suppress="plant not steady")
    # missing since 10; released at 20 (gap 10 s < 30 s): normal, no evidence either way
    assert _feed(a, [(10, NAN)], suppress="plant not steady") == []
    assert _feed(a, [(20, NAN), (40, NAN)]) == [(20, SUPPRESSED, NORMAL), (40, NORMAL, UNAVAILABLE)]
    b = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, unavailable_after=30.0)
    b.update(NAN, 0, suppress="load low")
    # missing for 50 s by the time suppression lifts: straight to unavailable
    assert _feed(b, [(50, NAN)]) == [(50, SUPPRESSED, UNAVAILABLE)]


def test_short_gap_does_not_reset_the_on_delay():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH, on_delay=30.0)
    seq = [(0, 11.0), (10, NAN), (20, NAN), (30, 11.0)]
    assert _feed(a, seq) == [(0, NORMAL, PENDING), (30, PENDING, ACTIVE)]
    b = ThresholdAlarm("p", Level("alarm", 10.0, 9.0), HIGH)  # unavailable_after None
    b.update(11.0, 0)
    assert _feed(b, [(t, NAN) for t in range(10, 10_000, 10)]) == []
    assert b.state == ACTIVE


def test_two_level_exhaust_moisture_severity():
    # Defaults 10 % warning / 12 % alarm are common practice, not a manufacturer limit.
    a = exhaust_moisture_alarm(on_delay=0.0, off_delay=0.0, deadband=0.005)
    seq = [0.09, 0.105, 0.125, 0.118, 0.114, 0.097, 0.094]
    severities = []
    transitions = []
    for t, v in enumerate(seq):
        transitions += [(tr.time, tr.level, tr.new) for tr in a.update(v, t)]
        severities.append(a.severity)
    assert severities == [None, "warning", "alarm", "alarm", "warning", "warning", None]
    assert transitions == [
        (1, "warning", ACTIVE),
        (2, "alarm", ACTIVE),
        (4, "alarm", NORMAL),  # 0.114 < 0.115
        (6, "warning", NORMAL),  # 0.094 < 0.095
    ]
    assert a.states == {"warning": NORMAL, "alarm": NORMAL}


def test_exhaust_moisture_defaults():
    a = exhaust_moisture_alarm()
    # common practice: 10 % warning, 12 % alarm (not a manufacturer limit)
    got = [(lv.level.name, lv.level.set_at, lv.level.clear_at) for lv in a.levels.values()]
    assert got == [
        ("warning", 0.10, pytest.approx(0.095)),
        ("alarm", 0.12, pytest.approx(0.115)),
    ]
    assert a.direction == HIGH


def test_level_alarm_on_efficiency_shortfall():
    a = LevelAlarm("eta_hp_low", margin=0.02, deadband=0.005, on_delay=10.0)
    seq = [(0, 0.85, 0.86), (10, 0.835, 0.86), (20, 0.839, 0.86), (30, 0.84, 0.86), (40, 0.842, 0.86), (50, 0.846, 0.86)]  # fmt: skip
    out = []
    for t, actual, expected in seq:
        out += [(tr.time, tr.old, tr.new, round(tr.value, 6)) for tr in a.update(actual, expected, t)]  # fmt: skip
    # shortfall 0.025 at 10 s (pending), 0.021 at 20 s (held 10 s: active),
    # 0.018 at 40 s still inside the deadband (clears below 0.015), 0.014 clears
    assert out == [
        (10, NORMAL, PENDING, -0.025),
        (20, PENDING, ACTIVE, -0.021),
        (50, ACTIVE, NORMAL, -0.014),
    ]
    assert a.update(NAN, 0.86, 60) == [] and a.state == NORMAL


def test_suppression_reason():
    assert suppression_reason(steady=True, load=300e6, min_load=150e6) is None
    assert suppression_reason(steady=False) == "plant not steady"
    assert "below minimum" in suppression_reason(load=100e6, min_load=150e6)
    assert suppression_reason(load=NAN, min_load=150e6) == "load unavailable"
    assert suppression_reason() is None


def test_suspect_tracker_consecutive_windows():
    s = SuspectTracker(persistence=3, clear_after=2)
    windows = [
        ({"ft1"}, True),
        ({"ft1"}, True),
        ({"ft1", "pt2"}, False),  # unsteady: ignored
        ({"ft1"}, True),  # third consecutive steady suspect window: raised
        (set(), True),
        ({"ft1"}, True),  # clean run broken
        (set(), True),
        (set(), True),  # two clean in a row: cleared
    ]
    out = []
    for t, (sus, steady) in enumerate(windows):
        out += [(tr.time, tr.alarm, tr.new) for tr in s.update(sus, t, steady=steady)]
    assert out == [(3, "ft1", ACTIVE), (7, "ft1", NORMAL)]
    assert s.raised == frozenset()


def test_suspect_tracker_n_of_m_and_untested_tags():
    s = SuspectTracker(persistence=2, window=4)
    assert s.update({"t1"}, 0) == []
    assert s.update(set(), 1) == []
    assert s.update(set(), 2) == []
    (tr,) = s.update({"t1"}, 3)  # 2 of the last 4
    assert (tr.alarm, tr.new, tr.value) == ("t1", ACTIVE, 2.0)
    assert s.state("t1") == ACTIVE
    # an untested window neither counts clean nor suspect
    for t in range(4, 10):
        assert s.update(set(), t, tested={"other"}) == []
    assert s.state("t1") == ACTIVE
    # four clean tested windows clear it (clear_after defaults to window)
    out = [tr.new for t in range(10, 14) for tr in s.update(set(), t)]
    assert out == [NORMAL]
    # one isolated suspect window afterwards is not enough again
    assert s.update({"t1"}, 14) == [] and s.state("t1") == NORMAL


@pytest.mark.parametrize(
    ("build", "match"),
    [
        (lambda: ThresholdAlarm("x", Level("a", 10.0, 11.0), HIGH), "must not be above"),
        (lambda: ThresholdAlarm("x", Level("a", 10.0, 9.0), LOW), "must not be below"),
        (lambda: ThresholdAlarm("x", Level("a", 10.0, 9.0), "up"), "direction"),
        (lambda: ThresholdAlarm("x", Level("a", 1.0, 0.0), on_delay=-1.0), "on_delay"),
        (lambda: GradedAlarm("x", [Level("w", 0.12, 0.1), Level("a", 0.10, 0.09)]), "more severe"),
        (lambda: GradedAlarm("x", []), "at least one level"),
        (lambda: LevelAlarm("x", margin=0.0), "margin"),
        (lambda: LevelAlarm("x", margin=0.01, deadband=0.01), "deadband"),
        (lambda: SuspectTracker(persistence=3, window=2), "window"),
    ],
)
def test_bad_arguments_raise(build, match):
    with pytest.raises(ValueError, match=match):
        build()


def test_time_must_not_go_backwards():
    a = ThresholdAlarm("p", Level("alarm", 10.0, 9.0))
    a.update(1.0, 10.0)
    with pytest.raises(ValueError, match="backwards"):
        a.update(1.0, 9.0)


def test_alarm_and_suspect_snapshots_resume_the_same_state_machines() -> None:
    # A restored alarm must continue exactly as the one that kept running: same
    # transitions at the same windows (on-delay timers included).
    import json

    def fresh() -> tuple[GradedAlarm, SuspectTracker]:
        return (exhaust_moisture_alarm(warning=0.10, alarm=0.12, deadband=0.005, on_delay=30, off_delay=30),
                SuspectTracker(3))

    a_alarm, a_sus = fresh()
    values = [0.09, 0.105, 0.11, 0.125, 0.13, 0.13, 0.09, 0.08, 0.08, 0.08, 0.08]
    suspects = [["A"], ["A"], [], ["A"], ["A", "B"], ["A"], [], [], [], [], []]
    for k in range(3):  # on-delay under way at the snapshot
        a_alarm.update(values[k], 10.0 * k)
        a_sus.update(suspects[k], 10.0 * k)
    snap = json.loads(json.dumps({"alarm": a_alarm.snapshot(), "suspects": a_sus.snapshot()}))
    b_alarm, b_sus = fresh()
    b_alarm.restore(snap["alarm"])
    b_sus.restore(snap["suspects"])
    for k in range(3, len(values)):
        assert a_alarm.update(values[k], 10.0 * k) == b_alarm.update(values[k], 10.0 * k)
        assert a_sus.update(suspects[k], 10.0 * k) == b_sus.update(suspects[k], 10.0 * k)
    assert a_alarm.states == b_alarm.states and a_sus.raised == b_sus.raised
    with pytest.raises(ValueError, match="unknown state"):
        b_alarm.levels["warning"].restore({"state": "bogus"})
