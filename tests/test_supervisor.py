"""The device supervisor: driver faults are recorded as gaps and the driver is reopened."""

from __future__ import annotations

import threading
import time
from typing import Any, Mapping

import numpy as np

from straind.block import Block, EngineeringBlock, Quality
from straind.chain import DeviceChain
from straind.config import load_config_text
from straind.drivers.base import Driver, DriverInfo, DriverIOError
from straind.events import Event
from straind.supervisor import Backoff, DeviceRunner

CFG = """
station: {id: s}
storage: {path: /tmp/unused}
devices:
  - name: d
    driver: simulated-bridge
    sample_rate_hz: 1000
    block_samples: 100
    stall_timeout_s: 0.5
    adc: {gain: 128}
    channels:
      - {name: g, sensor: strain_gauge, gauge_factor: 2, gauge_ohm: 350, bridge: quarter,
         excitation_v: 5, options: {truth: {kind: constant, value: 0}}}
"""


class Flaky(Driver):
    """Delivers 3 blocks, then fails; after reopening, continues. Counts opens."""

    summary = "test driver"
    opens = 0
    stall = False

    @classmethod
    def static_info(cls, options: Mapping[str, Any]) -> DriverInfo:
        return DriverInfo("test", 32, 1, 10_000)

    def open(self) -> None:
        type(self).opens += 1
        self.n = 0
        self.is_open = True

    def read_block(self, timeout_s: float) -> Block | None:
        if type(self).stall and type(self).opens == 1 and self.n >= 2:
            time.sleep(min(timeout_s, 0.05))
            return None
        if type(self).opens == 1 and self.n == 3:
            raise DriverIOError("device vanished")
        rows = self.setup.block_samples
        blk = Block("d", np.full((rows, 1), 1000, np.int32), np.zeros((rows, 1), np.uint8),
                    self.n * rows, self.setup.period_ns, self.n, time.monotonic_ns(),
                    time.time_ns())
        self.n += 1
        time.sleep(0.002)
        return blk

    def close(self) -> None:
        self.is_open = False


class Collect:
    def __init__(self) -> None:
        self.blocks: list[EngineeringBlock] = []
        self.events: list[Event] = []

    def submit(self, block: EngineeringBlock) -> bool:
        self.blocks.append(block)
        return True

    def record_event(self, event: Event) -> None:
        self.events.append(event)


def _run(stall: bool) -> tuple[Collect, list[Event], DeviceRunner]:
    Flaky.opens = 0
    Flaky.stall = stall
    dev = load_config_text(CFG).devices[0]
    sink = Collect()
    events: list[Event] = []
    runner = DeviceRunner(dev, Flaky, DeviceChain(dev), [sink], events.append)
    runner.start()
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and len(sink.blocks) < 8:
        time.sleep(0.01)
    runner.stop()
    runner.join(5)
    return sink, events, runner


def test_fault_records_gap_and_reopens() -> None:
    sink, events, runner = _run(stall=False)
    assert not runner.is_alive() and runner.state == "stopped"
    assert Flaky.opens >= 2
    kinds = [e.kind for e in events]
    assert "driver_fault" in kinds and "gap" in kinds
    gap = next(e for e in events if e.kind == "gap")
    assert gap.detail["reason"] == "device vanished"
    # the first block after the reopen carries AFTER_GAP, the others do not
    flagged = [b for b in sink.blocks if (b.quality[0] & Quality.AFTER_GAP).any()]
    assert len(flagged) == 1 and flagged[0] is sink.blocks[3]
    assert gap.detail["first_sample_after_ns"] == sink.blocks[3].t0_ns
    assert gap.detail["last_sample_before_ns"] == sink.blocks[2].times_ns()[-1]


def test_stalled_driver_is_reopened() -> None:
    sink, events, runner = _run(stall=True)
    faults = [e for e in events if e.kind == "driver_fault"]
    assert faults and "stalled" in faults[0].detail["error"]
    assert Flaky.opens >= 2


def test_backoff_is_capped_and_resets() -> None:
    b = Backoff(0.5, 4.0)
    assert [b.wait_s() for _ in range(6)] == [0.5, 1.0, 2.0, 4.0, 4.0, 4.0]
    b.reset()
    assert b.wait_s() == 0.5
