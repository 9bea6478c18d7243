"""Sample times from the device's sample clock, anchored to UTC once per run of a driver.

A block's time is anchor_utc + (start_index - anchor_index) * period: the host's arrival time
only sets the anchor, so jitter in USB or scheduling never reaches the stored times, and times
stay monotonic while the driver runs. The wall clock is watched against the monotonic clock;
a jump between them is a clock step, reported but never applied to running sample times.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

from straind.block import Block

__all__ = ["Timebase", "ClockStep"]

#: a change of wall-minus-monotonic larger than this is a clock step (ns)
STEP_THRESHOLD_NS = 500_000_000


@dataclass(frozen=True)
class ClockStep:
    """The wall clock moved against the monotonic clock by step_ns (positive = forward)."""

    step_ns: int
    wall_ns: int


class Timebase:
    """Stamps blocks of one device with UTC times from its sample counter."""

    def __init__(self, period_ns: int, wall_clock_ns: Callable[[], int] = time.time_ns,
                 mono_clock_ns: Callable[[], int] = time.monotonic_ns):
        self.period_ns = int(period_ns)
        self.wall_clock_ns = wall_clock_ns
        self.mono_clock_ns = mono_clock_ns
        self.anchor_ns: int | None = None
        self.anchor_index = 0
        self._offset_ns: int | None = None  # wall - mono at the last check
        self.steps: list[ClockStep] = []
        #: time of the last sample stamped (also handed over from a runner this one replaces)
        self.floor_ns: int | None = None

    def reanchor(self) -> None:
        """Anchor again at the next block (after a driver reopen or at a new segment)."""
        self.anchor_ns = None

    def stamp(self, block: Block) -> Block:
        if self.anchor_ns is None or block.start_index < self.anchor_index:
            # the block's last sample arrived at host_wall_ns
            anchor = block.host_wall_ns - (block.n_samples - 1) * self.period_ns
            if self.floor_ns is not None and 0 <= self.floor_ns - anchor < STEP_THRESHOLD_NS:
                # the sample clock ran a little ahead of the host clock before the reopen: keep
                # times increasing (a larger overlap is a clock step, left for the store to see)
                anchor = self.floor_ns + self.period_ns
            self.anchor_ns = anchor
            self.anchor_index = block.start_index
        t0 = self.anchor_ns + (block.start_index - self.anchor_index) * self.period_ns
        self.floor_ns = t0 + (block.n_samples - 1) * self.period_ns
        return block.with_time(t0)

    def check_clock(self) -> ClockStep | None:
        """Compare wall and monotonic clocks; return a ClockStep when the wall clock jumped."""
        offset = self.wall_clock_ns() - self.mono_clock_ns()
        prev, self._offset_ns = self._offset_ns, offset
        if prev is None:
            return None
        step = offset - prev
        if abs(step) > STEP_THRESHOLD_NS:
            ev = ClockStep(step, offset + self.mono_clock_ns())
            self.steps.append(ev)
            return ev
        return None
