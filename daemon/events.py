"""Events: the things that happened beside the data (tare, gaps, configuration loads, alarms).

Every event is stored in the segment's `events` table and published on the feed's events topic.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from typing import Any, Mapping

__all__ = ["Event", "make_event"]


@dataclass(frozen=True)
class Event:
    """One event. time_ns is UTC wall-clock ns; detail is JSON-serialisable.

    kind:   short lower-case word, e.g. tare, gap, driver_fault, config_load, clock_step,
            alarm_raised, alarm_cleared, shunt_cal, mark, command, unclean_stop, storage_fault.
    origin: who caused it: "service", "driver", "control-socket", "mqtt", "startup".
    """

    time_ns: int
    kind: str
    device: str = ""
    channel: str = ""
    detail: Mapping[str, Any] = field(default_factory=dict)
    origin: str = "service"

    def detail_json(self) -> str:
        return json.dumps(self.detail, sort_keys=True, default=str, separators=(",", ":"))

    def as_dict(self) -> dict[str, Any]:
        return {"time_ns": self.time_ns, "kind": self.kind, "device": self.device,
                "channel": self.channel, "detail": dict(self.detail), "origin": self.origin}


def make_event(kind: str, device: str = "", channel: str = "", origin: str = "service",
               time_ns: int | None = None, **detail: Any) -> Event:
    """An event stamped with the current wall clock unless `time_ns` is given."""
    return Event(time.time_ns() if time_ns is None else int(time_ns), kind, device, channel,
                 detail, origin)
