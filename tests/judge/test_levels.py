"""Level state machines driven by hand-written value sequences.

The rule (README, What is published; a choice of this project): raised when
the value has stayed at or above its limit for `delay` seconds of stream
time; lowered when it has stayed below limit * (1 - hysteresis) for `delay`
seconds. Every expected change and time below is worked by hand from that
rule, one value a second (0.4 s in the last test); the sequences are
invented. Limits 10 and 20 with hysteresis 0.1 clear below 9 and 18.
"""

import math

from monitor.judge.levels import LevelMachine


def drive(machine, values, step=1.0):
    """Feed values one per `step` seconds; return [(t, previous, new)]."""
    changes = []
    for i, v in enumerate(values):
        change = machine.update(v, i * step)
        if change:
            changes.append((i * step, *change))
    return changes


def band(delay=2.0, hysteresis=0.1, warning=10.0, alarm=20.0):
    return LevelMachine([("warning", warning), ("alarm", alarm)], hysteresis, delay)


def test_delay_must_hold_before_raising():
    # Above the limit at t=2,3,4: held 2 s at t=4.
    assert drive(band(), [5, 5, 11, 11, 11, 11]) == [(4.0, "normal", "warning")]


# Above at t=0, 1; the dip at 2 restarts the delay; above from 3, held 2 s at 5.
def test_a_dip_restarts_the_delay():
    assert drive(band(), [11, 11, 9, 11, 11, 11]) == [(5.0, "normal", "warning")]


# README: "at or above its limit"; with no delay the change comes at once.
def test_at_the_limit_counts_as_above():
    assert drive(band(delay=0.0), [10.0]) == [(0.0, "normal", "warning")]


def test_hysteresis_holds_the_level_until_clearly_below():
    # Clears below 10 * (1 - 0.1) = 9; 9.5 is not enough.
    m = band(delay=0.0)
    assert drive(m, [11, 9.5, 9.5, 9.0, 8.9]) == [(0.0, "normal", "warning"), (4.0, "warning", "normal")]


# 12 from t=0, held 1 s at 1; 25 from t=2, held 1 s at 3.
def test_two_levels_in_turn():
    m = band(delay=1.0)
    assert drive(m, [12, 12, 25, 25, 25]) == [(1.0, "normal", "warning"), (3.0, "warning", "alarm")]


def test_straight_to_alarm_gives_one_event():
    assert drive(band(delay=1.0), [25, 25, 25]) == [(1.0, "normal", "alarm")]


def test_direct_drop_from_alarm_to_normal():
    m = band(delay=1.0)
    # 25 from t=0, held 1 s at 1; 1 from t=2 is below both limits' clearing
    # values (9 and 18), held 1 s at 3: one change, straight down.
    changes = drive(m, [25, 25, 1, 1, 1])
    assert changes == [(1.0, "normal", "alarm"), (3.0, "alarm", "normal")]


def test_drop_from_alarm_to_warning():
    m = band(delay=1.0)
    # 15 is below alarm * 0.9 = 18 but not below warning * 0.9 = 9.
    assert drive(m, [25, 25, 15, 15, 15]) == [(1.0, "normal", "alarm"), (3.0, "alarm", "warning")]


# None at t=2 and NaN at 5 restart the delay: 11 from 6, held 2 s at 8.
def test_unmeasurable_values_change_nothing_and_restart_timers():
    m = band(delay=2.0)
    assert drive(m, [11, 11, None, 11, 11, math.nan, 11, 11, 11]) == [(8.0, "normal", "warning")]


# No delay: 5.0 >= 4.5 raises at t=0; 1.0 < 4.5 * 0.9 lowers at t=1.
def test_only_one_limit():
    m = LevelMachine([("warning", None), ("alarm", 4.5)], 0.1, 0.0)
    assert drive(m, [5.0, 1.0]) == [(0.0, "normal", "alarm"), (1.0, "alarm", "normal")]


def test_no_limits_never_changes():
    m = LevelMachine([("warning", None), ("alarm", None)], 0.1, 0.0)
    assert drive(m, [1e9, 0, 1e9]) == []
    assert m.level == "normal"


def test_delay_counts_stream_time_not_calls():
    # Results 0.4 s apart (a hop): a 3 s delay needs the 8th step after the first.
    m = band(delay=3.0)
    changes = drive(m, [11] * 20, step=0.4)
    assert changes[0][0] == 3.2
