"""Limit alarms: hysteresis, hold times, NaN handling and block-boundary independence.

Oracles: transition times worked out by hand for scripted signals, and a plain per-sample
state machine written in this file (one Python step per sample) for random signals; rate
alarms against numpy.polyfit over the rate window.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from straind.alarms import AlarmRule, AlarmState, AlarmTransition
from straind.creep import CreepRate

NS = 10**9
T0 = 1_700_000_000 * NS


def times(n: int, step_s: float = 1.0) -> np.ndarray:
    return T0 + np.round(np.arange(n) * step_s * NS).astype(np.int64)


def events(trs: list[AlarmTransition]) -> list[tuple[str, float]]:
    """(event, seconds since T0) pairs."""
    return [(tr.event, (tr.time_ns - T0) / NS) for tr in trs]


def feed(state: AlarmState, t, x, sizes) -> list[AlarmTransition]:
    out, pos = [], 0
    for s in sizes:
        out += state.update(t[pos:pos + s], x[pos:pos + s])
        pos += s
    assert pos == len(t)
    return out


def reference_machine(rule: AlarmRule, t, x) -> list[tuple[str, int, float]]:
    """One Python step per sample, straight from the rule's stated semantics."""
    hold_raise = rule.hold_s * NS
    hold_clear = (rule.hold_s if rule.clear_hold_s is None else rule.clear_hold_s) * NS
    high = rule.kind.endswith("high")
    active, since, out = False, None, []
    for ti, xi in zip(t.tolist(), x.tolist()):
        if math.isnan(xi):
            continue                                   # skipped entirely
        if not active:
            ok = xi > rule.limit if high else xi < rule.limit
        else:
            ok = xi <= rule.limit - rule.hysteresis if high else xi >= rule.limit + rule.hysteresis
        if not ok:
            since = None
            continue
        if since is None:
            since = ti
        if ti - since >= (hold_clear if active else hold_raise):
            active = not active
            out.append(("raised" if active else "cleared", ti, xi))
            since = None
    return out


# --------------------------------------------------------------------------- scripted signals

def test_high_with_hysteresis_and_hold_scripted():
    rule = AlarmRule(channel="sg1", kind="high", limit=10.0, hysteresis=2.0, hold_s=3.0)
    #        t: 0  1  2   3   4   5   6  7  8  9 10 11 12 13  14  15  16 17 18 19
    x = np.array([0, 0, 11, 11, 11, 11, 9, 7, 7, 7, 7, 7, 0, 11, 12, 9, 11, 11, 11, 11], float)
    trs = AlarmState(rule).update(times(x.size), x)
    # by hand: above 10 from t=2, held 3 s at t=5 -> raised; 9 is inside the band (stays
    # active); <= 8 from t=7, held 3 s at t=10 -> cleared; 11,12 at t=13,14 then 9 at t=15
    # breaks the run; again above from t=16, held 3 s at t=19 -> raised
    assert events(trs) == [("raised", 5.0), ("cleared", 10.0), ("raised", 19.0)]
    assert [tr.since_ns for tr in trs] == [T0 + 2 * NS, T0 + 7 * NS, T0 + 16 * NS]
    assert trs[0].value == 11.0 and trs[0].limit == 10.0 and trs[1].limit == 8.0
    assert trs[0].rule == "sg1.high" and trs[0].severity == "warning"


def test_low_with_separate_clear_hold_scripted():
    rule = AlarmRule(channel="p", kind="low", limit=-5.0, hysteresis=1.0, hold_s=0.0,
                     clear_hold_s=2.0, severity="critical", name="pressure low")
    #        t:  0   1   2     3   4   5   6   7   8
    x = np.array([0, -6, -4.5, -4, -3, -6, -3, -3, -3], float)
    trs = AlarmState(rule).update(times(x.size), x)
    # by hand: -6 < -5 at t=1 -> raised at once (hold 0); clear needs >= -4: from t=3,
    # 2 s later at t=5... but t=5 is -6, which breaks it; -4 (t=3), -3 (t=4): only 1 s.
    # >= -4 again from t=6, held 2 s at t=8 -> cleared
    assert events(trs) == [("raised", 1.0), ("cleared", 8.0)]
    assert trs[0].rule == "pressure low" and trs[0].severity == "critical"


def test_value_equal_to_thresholds():
    # raise is strict (> limit), clear is inclusive (<= limit - hysteresis)
    rule = AlarmRule(channel="c", kind="high", limit=10.0, hysteresis=0.0)
    x = np.array([10.0, 10.0000001, 10.0, 9.0])
    trs = AlarmState(rule).update(times(4), x)
    assert events(trs) == [("raised", 1.0), ("cleared", 2.0)]


def test_nan_neither_raises_clears_nor_breaks_a_run():
    rule = AlarmRule(channel="c", kind="high", limit=10.0, hysteresis=1.0, hold_s=3.0)
    nan = np.nan
    #        t:  0   1    2    3   4   5    6    7    8   9  10  11  12
    x = np.array([11, nan, nan, 11, 0, 11, nan, nan, 11, 5, nan, nan, 5], float)
    trs = AlarmState(rule).update(times(x.size), x)
    # by hand: run from t=0, NaN skipped, 11 at t=3 -> 3 s -> raised; 0 at t=4 starts the
    # clear run, 11 at t=5 breaks it; 5 at t=9 starts a clear run, NaNs skipped, 5 at t=12 ->
    # 3 s -> cleared
    assert events(trs) == [("raised", 3.0), ("cleared", 12.0)]
    # all-NaN blocks change nothing, also in the middle of a pending run
    st = AlarmState(rule)
    assert st.update(times(2), np.array([11.0, 11.0])) == []
    assert st.update(times(3)[2:], np.array([nan])) == []
    assert events(st.update(times(4)[3:], np.array([11.0]))) == [("raised", 3.0)]
    assert st.active


def test_hold_carries_across_blocks_exactly():
    rule = AlarmRule(channel="c", kind="high", limit=1.0, hold_s=2.5)
    t = times(10, step_s=0.5)
    x = np.array([0, 2, 2, 2, 2, 2, 2, 2, 0, 0], float)
    st = AlarmState(rule)
    got = []
    for i in range(10):                               # one sample per block
        got += st.update(t[i:i + 1], x[i:i + 1])
    # run from t=0.5 s, 2.5 s later is t=3.0 s (sample 6)
    assert events(got) == [("raised", 3.0)]
    assert st.active


# --------------------------------------------------------------------------- random signals

RULES = [
    AlarmRule(channel="a", kind="high", limit=0.3, hysteresis=0.2, hold_s=2.0),
    AlarmRule(channel="a", kind="low", limit=-0.4, hysteresis=0.2, hold_s=0.0, clear_hold_s=5.0),
    AlarmRule(channel="a", kind="high", limit=0.0, hysteresis=0.0, hold_s=0.7),
]


@pytest.mark.parametrize("rule", RULES, ids=["high", "low", "high-nohyst"])
def test_random_signal_matches_reference_and_any_block_split(rule):
    rng = np.random.default_rng(42)
    n = 20_000
    t = T0 + np.cumsum(rng.integers(50_000_000, 400_000_000, n)).astype(np.int64)  # irregular
    x = np.cumsum(rng.standard_normal(n)) * 0.05
    x = x - np.convolve(x, np.ones(200) / 200, mode="same")        # wander around 0
    x[rng.random(n) < 0.03] = np.nan
    expected = reference_machine(rule, t, x)
    assert len(expected) > 10
    for sizes in ([n], [1] * 500 + [n - 500], None):
        if sizes is None:
            sizes = []
            while sum(sizes) < n:
                sizes.append(int(rng.integers(0, 700)))
            sizes[-1] -= sum(sizes) - n
        got = feed(AlarmState(rule), t, x, sizes)
        assert [(g.event, g.time_ns, g.value) for g in got] == expected


# --------------------------------------------------------------------------- rate alarms

def test_rate_high_alarm_against_polyfit_rate():
    # strain creeping at 1 ue/h, then at 6 ue/h from 3 h; alarm above 4 ue/h over a 1 h window
    n = 6 * 3600
    t = times(n)
    t_h = np.arange(n) / 3600.0
    x = 100.0 + np.where(t_h < 3.0, t_h, 3.0 + 6.0 * (t_h - 3.0))
    rule = AlarmRule(channel="sg", kind="rate_high", limit=4.0, hysteresis=1.0, hold_s=60.0,
                     rate_window_s=3600.0)
    state = AlarmState(rule)
    trs = feed(state, t, x, [997] * (n // 997) + [n % 997])
    assert [tr.event for tr in trs] == ["raised"]
    i = int(np.searchsorted(t, trs[0].time_ns))
    since = int(np.searchsorted(t, trs[0].since_ns))
    # numpy.polyfit over the documented rate window (see straind.creep)
    cr = CreepRate(3600.0)
    k = t // cr.bin_ns

    def rate_at(j):
        sel = (k >= k[j] - cr.window_bins + 1) & (np.arange(n) <= j)
        return np.polyfit((t[sel] - t[j]) / 1e9, x[sel], 1)[0] * 3600.0

    assert rate_at(since) > 4.0 >= rate_at(since - 1)      # the run began at the crossing
    assert (trs[0].time_ns - trs[0].since_ns) == 60 * NS     # and the hold was exactly 60 s
    assert trs[0].value == pytest.approx(rate_at(i), rel=1e-9)
    assert 3.0 < t_h[i] < 4.0
    assert state.active


def test_rate_low_alarm_raises_on_a_stalled_signal():
    n = 4 * 3600
    t = times(n)
    t_h = np.arange(n) / 3600.0
    x = np.where(t_h < 2.0, 2.0 * t_h, 4.0)                     # creep stops at 2 h
    rule = AlarmRule(channel="sg", kind="rate_low", limit=0.5, rate_window_s=1800.0)
    trs = AlarmState(rule).update(t, x)
    assert [tr.event for tr in trs] == ["raised"]
    # the 30 min slope falls below 0.5 ue/h somewhat after 2 h (window mostly flat by then)
    assert 2.0 < (trs[0].time_ns - T0) / 3.6e12 < 2.5


# --------------------------------------------------------------------------- validation

@pytest.mark.parametrize("kwargs", [
    dict(kind="above"),
    dict(hysteresis=-1.0),
    dict(hold_s=-0.1),
    dict(clear_hold_s=-1.0),
    dict(limit=float("nan")),
    dict(severity="urgent"),
    dict(kind="rate_high"),                    # needs rate_window_s
    dict(rate_window_s=60.0),                  # only for rate kinds
    dict(channel=""),
])
def test_rule_validation(kwargs):
    base = dict(channel="c", kind="high", limit=1.0)
    base.update(kwargs)
    with pytest.raises(ValueError):
        AlarmRule(**base)


def test_state_input_checks_and_reset():
    st = AlarmState(AlarmRule(channel="c", kind="high", limit=1.0))
    with pytest.raises(ValueError):
        st.update(np.array([1.0, 2.0]), np.array([1.0, 2.0]))
    with pytest.raises(ValueError):
        st.update(times(2), np.array([1.0]))
    assert events(st.update(times(1), np.array([5.0]))) == [("raised", 0.0)]
    st.reset()
    assert not st.active
    assert st.update(np.array([], dtype=np.int64), np.array([])) == []
