"""Limit alarms with hysteresis and hold time, evaluated block by block.

Pure state machines; no I/O. One :class:`AlarmState` per :class:`AlarmRule`, fed the rule's
channel block by block; it returns the transitions found in each block.

Semantics (exact)
-----------------
Level kinds compare the channel value; rate kinds compare the channel's rate of change in value
unit per hour, the least-squares slope over ``rate_window_s`` computed by
:class:`straind.creep.CreepRate` (see there for the window and when a rate exists).

=========  ==========================  ==============================
kind       raise condition             clear condition
=========  ==========================  ==============================
high       value > limit               value <= limit - hysteresis
low        value < limit               value >= limit + hysteresis
rate_high  rate > limit                rate <= limit - hysteresis
rate_low   rate < limit                rate >= limit + hysteresis
=========  ==========================  ==============================

* An inactive alarm is **raised** at the first sample at which the raise condition has held on
  every usable sample since the start of its current run, and that sample is at least
  ``hold_s`` after the run's first sample (``hold_s = 0``: the first sample that meets it).
* An active alarm is **cleared** the same way with the clear condition and ``clear_hold_s``
  (default: ``hold_s``). Samples between the two thresholds (the hysteresis band) keep the
  state and restart any pending run.
* Usable samples are finite values (for rate kinds: samples with a rate). NaN samples neither
  raise nor clear, and they neither break nor extend a run: they are skipped, so a run's hold
  time is measured between usable samples.
* A transition is reported with the time and value of the sample that completes it and the
  time the run began (``since_ns``). Runs carry across blocks, so the transitions do not depend
  on how the samples are split into blocks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .creep import CreepRate

__all__ = ["KINDS", "SEVERITIES", "AlarmRule", "AlarmTransition", "AlarmState"]

KINDS = ("high", "low", "rate_high", "rate_low")
SEVERITIES = ("info", "warning", "critical")
_NS = 1_000_000_000


@dataclass(frozen=True)
class AlarmRule:
    """One limit on one channel.

    limit:        threshold in the channel's unit (rate kinds: unit per hour).
    hysteresis:   >= 0, same unit as limit; the clear threshold is limit -/+ hysteresis.
    hold_s:       the raise condition must persist this long (s) before the alarm is raised.
    clear_hold_s: the clear condition must persist this long (s); None = hold_s.
    rate_window_s: least-squares window (s) of the rate, required for rate kinds only.
    name:         identifier in transitions; default "<channel>.<kind>".
    """

    channel: str
    kind: str
    limit: float
    hysteresis: float = 0.0
    hold_s: float = 0.0
    clear_hold_s: float | None = None
    severity: str = "warning"
    name: str = ""
    rate_window_s: float | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.channel, str) or not self.channel:
            raise ValueError(f"channel: expected a channel name, got {self.channel!r}")
        if self.kind not in KINDS:
            raise ValueError(f"kind: expected one of {', '.join(KINDS)}, got {self.kind!r}")
        if self.severity not in SEVERITIES:
            raise ValueError(
                f"severity: expected one of {', '.join(SEVERITIES)}, got {self.severity!r}"
            )
        for key in ("limit", "hysteresis", "hold_s"):
            val = getattr(self, key)
            if isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(val):
                raise ValueError(f"{key}: expected a finite number, got {val!r}")
            object.__setattr__(self, key, float(val))
        if self.hysteresis < 0.0:
            raise ValueError(f"hysteresis: expected a value >= 0, got {self.hysteresis!r}")
        if self.hold_s < 0.0:
            raise ValueError(f"hold_s: expected a duration >= 0, got {self.hold_s!r}")
        if self.clear_hold_s is not None:
            c = self.clear_hold_s
            if isinstance(c, bool) or not isinstance(c, (int, float)) or not (math.isfinite(c) and c >= 0):
                raise ValueError(f"clear_hold_s: expected a duration >= 0, got {c!r}")
            object.__setattr__(self, "clear_hold_s", float(c))
        is_rate = self.kind.startswith("rate_")
        if is_rate:
            w = self.rate_window_s
            if w is None or isinstance(w, bool) or not isinstance(w, (int, float)) or not (
                math.isfinite(w) and w > 0
            ):
                raise ValueError(f"rate_window_s: a {self.kind} rule needs a positive window, got {w!r}")
            object.__setattr__(self, "rate_window_s", float(w))
        elif self.rate_window_s is not None:
            raise ValueError(f"rate_window_s: only used by rate kinds, not {self.kind!r}")
        if not self.name:
            object.__setattr__(self, "name", f"{self.channel}.{self.kind}")

    @property
    def is_rate(self) -> bool:
        return self.kind.startswith("rate_")

    @property
    def clear_limit(self) -> float:
        """Threshold the value (or rate) must come back past to clear."""
        if self.kind.endswith("high"):
            return self.limit - self.hysteresis
        return self.limit + self.hysteresis


@dataclass(frozen=True)
class AlarmTransition:
    """A raise or clear; value is the compared quantity (rate in unit per hour for rate kinds)."""

    rule: str
    channel: str
    kind: str
    severity: str
    event: str          # "raised" | "cleared"
    time_ns: int
    value: float
    since_ns: int       # first sample of the run that led to this transition
    limit: float        # threshold crossed: limit when raised, clear_limit when cleared


@dataclass
class AlarmState:
    """State machine of one rule. Feed blocks in time order with :meth:`update`.

    ``rate``: the rule's rate estimator (rate kinds only; built from the rule by default).
    """

    rule: AlarmRule
    active: bool = False
    _run_since_ns: int | None = field(default=None, init=False, repr=False)
    rate: CreepRate | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        if self.rule.is_rate and self.rate is None:
            self.rate = CreepRate(self.rule.rate_window_s)  # type: ignore[arg-type]

    def reset(self) -> None:
        """Back to inactive with no pending run (and an empty rate window)."""
        self.active = False
        self._run_since_ns = None
        if self.rate is not None:
            self.rate.reset()

    def _condition(self, x: np.ndarray, active: bool) -> np.ndarray:
        r = self.rule
        high = r.kind.endswith("high")
        if not active:
            return x > r.limit if high else x < r.limit
        return x <= r.clear_limit if high else x >= r.clear_limit

    def update(self, times_ns: np.ndarray, values: np.ndarray) -> list[AlarmTransition]:
        """Add a block of (n,) integer times (ns) and (n,) values; return its transitions."""
        t = np.asarray(times_ns)
        x = np.asarray(values, dtype=np.float64)
        if t.ndim != 1 or x.shape != t.shape:
            raise ValueError(f"times_ns, values: expected equal 1-d shapes, got {t.shape}, {x.shape}")
        if t.size and not np.issubdtype(t.dtype, np.integer):
            raise ValueError(f"times_ns: expected integer nanoseconds, got dtype {t.dtype}")
        t = t.astype(np.int64)
        if self.rate is not None:
            x = self.rate.update(t, x)
        keep = np.flatnonzero(np.isfinite(x))
        t, x = t[keep], x[keep]
        out: list[AlarmTransition] = []
        pos = 0
        rule = self.rule
        hold_raise = int(round(rule.hold_s * _NS))
        hold_clear = int(round((rule.hold_s if rule.clear_hold_s is None else rule.clear_hold_s) * _NS))
        # Few transitions per block: each pass scans the rest of the block with numpy.
        while pos < t.size:
            tt, cond = t[pos:], self._condition(x[pos:], self.active)
            hold = hold_clear if self.active else hold_raise
            starts = cond.copy()
            starts[1:] &= ~cond[:-1]
            if self._run_since_ns is not None and cond[0]:
                starts[0] = False
                seed = self._run_since_ns
            else:
                seed = np.iinfo(np.int64).min
            since = np.maximum.accumulate(np.where(starts, tt, np.iinfo(np.int64).min))
            since = np.maximum(since, seed)
            done = cond & (tt - since >= hold)
            if not done.any():
                self._run_since_ns = int(since[-1]) if cond[-1] else None
                break
            i = int(np.argmax(done))
            raised = not self.active
            out.append(
                AlarmTransition(
                    rule=rule.name,
                    channel=rule.channel,
                    kind=rule.kind,
                    severity=rule.severity,
                    event="raised" if raised else "cleared",
                    time_ns=int(tt[i]),
                    value=float(x[pos + i]),
                    since_ns=int(since[i]),
                    limit=rule.limit if raised else rule.clear_limit,
                )
            )
            self.active = raised
            self._run_since_ns = None
            pos += i + 1
        return out
