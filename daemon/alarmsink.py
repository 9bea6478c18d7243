"""The alarm sink: evaluates the configured `alarms` rules on every engineering block.

It is a Sink (submit(block) -> bool, record_event(event)) that runs one
:class:`straind.alarms.AlarmState` per rule on the rule's column, inline and vectorised (O(n) numpy
per block and rule, so it never holds up acquisition). Raised and cleared transitions become
events ``alarm_raised`` / ``alarm_cleared`` (detail: rule, alarm_kind, severity, value, limit,
since_ns, unit; the event time is the time of the sample that completed the transition),
passed to the service's emit, so they land in the HDF5 events table and on the feed.

Samples flagged SHUNT_ON (a shunt calibration is running: not a measurement of load) and
unusable samples (NaN) neither raise nor clear an alarm.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from straind.alarms import AlarmRule, AlarmState, AlarmTransition
from straind.block import EngineeringBlock, Quality
from straind.events import Event, make_event

__all__ = ["AlarmSink", "rules_from_config"]

log = logging.getLogger("straind.alarms")


def rules_from_config(alarms: Sequence[Mapping[str, Any]]) -> list[tuple[str, str, AlarmRule]]:
    """(device, column, rule) for each validated `alarms[]` entry (config fills device/column)."""
    out = []
    for a in alarms:
        rule = AlarmRule(channel=f"{a['device']}/{a['column']}", kind=a["kind"], limit=a["limit"],
                         hysteresis=a["hysteresis"], hold_s=a["hold_s"],
                         clear_hold_s=a["clear_hold_s"], severity=a["severity"], name=a["name"],
                         rate_window_s=a["rate_window_s"])
        out.append((a["device"], a["column"], rule))
    return out


@dataclass
class _Rule:
    device: str
    column: str
    state: AlarmState
    unit: str = ""
    last_value: float | None = None


class AlarmSink:
    """Limit alarms over the engineering blocks of every device.

    rules: from :func:`rules_from_config`. emit: where transitions go as events.
    """

    def __init__(self, rules: Sequence[tuple[str, str, AlarmRule]], emit: Callable[[Event], None]):
        self.emit = emit
        self._by_device: dict[str, list[_Rule]] = {}
        for dev, col, rule in rules:
            self._by_device.setdefault(dev, []).append(_Rule(dev, col, AlarmState(rule)))
        self._cols: dict[tuple[str, tuple[str, ...]], list[int | None]] = {}
        self._active: dict[str, dict[str, Any]] = {}
        self._lock = threading.Lock()
        self.blocks = 0
        self.transitions = 0
        self.errors = 0

    @property
    def n_rules(self) -> int:
        return sum(len(v) for v in self._by_device.values())

    def submit(self, block: EngineeringBlock) -> bool:
        rules = self._by_device.get(block.device)
        if not rules:
            return True
        key = (block.device, block.names)
        cols = self._cols.get(key)
        if cols is None:
            cols = [block.names.index(r.column) if r.column in block.names else None for r in rules]
            self._cols[key] = cols
        times = block.times_ns()
        for r, col in zip(rules, cols):
            if col is None:
                continue
            x = block.values[:, col]
            shunt = (block.quality[:, col] & np.uint8(Quality.SHUNT_ON)) != 0
            if shunt.any():
                x = np.where(shunt, np.nan, x)
            r.unit = block.units[col]
            try:
                found = r.state.update(times, x)
            except ValueError as exc:  # sample time went back (clock step across a reconnect)
                self.errors += 1
                log.warning("alarm %s: %s; its state starts again", r.state.rule.name, exc)
                r.state.reset()
                found = r.state.update(times, x)
            fin = np.isfinite(x)
            if fin.any():
                r.last_value = float(x[np.flatnonzero(fin)[-1]])
            for tr in found:
                self._transition(r, tr)
        self.blocks += 1
        return True

    def _transition(self, r: _Rule, tr: AlarmTransition) -> None:
        self.transitions += 1
        detail = {"rule": tr.rule, "alarm_kind": tr.kind, "severity": tr.severity,
                  "value": tr.value, "limit": tr.limit, "since_ns": tr.since_ns,
                  "unit": r.unit + ("/h" if tr.kind.startswith("rate_") else "")}
        with self._lock:
            if tr.event == "raised":
                self._active[tr.rule] = {"name": tr.rule, "device": r.device, "channel": r.column,
                                         "kind": tr.kind, "severity": tr.severity,
                                         "limit": tr.limit, "value": tr.value,
                                         "unit": detail["unit"], "raised_ns": tr.time_ns,
                                         "since_ns": tr.since_ns}
            else:
                self._active.pop(tr.rule, None)
        # a log line of its own (the generic event line is rate-limited per template)
        if tr.event == "raised":
            log.warning("ALARM %s raised (%s): %s/%s %s %.6g %s, limit %g", tr.rule, tr.severity,
                        r.device, r.column, tr.kind, tr.value, detail["unit"], tr.limit)
        else:
            log.info("alarm %s cleared: %s/%s %.6g %s, clear limit %g", tr.rule, r.device,
                     r.column, tr.value, detail["unit"], tr.limit)
        self.emit(make_event(f"alarm_{tr.event}", r.device, r.column, origin="service",
                             time_ns=tr.time_ns, **detail))

    def record_event(self, event: Event) -> None:
        """Alarms do not act on events."""

    def active(self) -> list[dict[str, Any]]:
        """The alarms raised and not cleared, oldest first."""
        with self._lock:
            return sorted((dict(a) for a in self._active.values()), key=lambda a: a["raised_ns"])

    def status(self) -> dict[str, Any]:
        return {"rules": self.n_rules, "active": len(self._active), "transitions": self.transitions,
                "blocks": self.blocks, "errors": self.errors}
