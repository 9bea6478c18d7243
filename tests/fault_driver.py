"""A driver plugin for fault-injection tests: the simulated bridge, plus faults switched by files.

It is installed into a child `straind run` the way a third-party plugin is: a `*.dist-info`
directory with an `entry_points.txt` on PYTHONPATH (see `install_fault_driver`), so the service
discovers it through the ordinary `straind.drivers` entry-point group.

Options (besides every simulated-bridge option):
    hang_file:  while this file exists, read_block does not return (a frozen transfer).
    stall_file: while this file exists, read_block waits its timeout and returns None (the
                instrument sends nothing; the supervisor's stall timeout then reopens it).
    event_every_block: report a device event (`frame_error`) with every block (a noisy fault).
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any, Mapping

from straind.block import Block
from straind.drivers.simulated import SimulatedBridge
from straind.schema import Field, Section

ENTRY_POINT = "fault-sim"


class FaultSim(SimulatedBridge):
    """Simulated bridge with file-switched hang, stall and noisy-event faults (tests only)."""

    summary = "simulated bridge with injectable faults (tests)"
    OPTIONS = Section({
        **SimulatedBridge.OPTIONS.fields,
        "hang_file": Field(str, "", doc="read_block hangs while this file exists"),
        "stall_file": Field(str, "", doc="read_block returns nothing while this file exists"),
        "event_every_block": Field(bool, False, doc="a device event with every block"),
    })

    def read_block(self, timeout_s: float) -> Block | None:
        opts: Mapping[str, Any] = self.options
        hang = opts.get("hang_file") or ""
        while hang and os.path.exists(hang):
            time.sleep(0.02)
        stall = opts.get("stall_file") or ""
        if stall and os.path.exists(stall):
            time.sleep(max(0.0, min(timeout_s, 0.25)))
            return None
        block = super().read_block(timeout_s)
        if block is not None and opts.get("event_every_block"):
            self.report("frame_error", seq=block.seq)
        return block


def install_fault_driver(site: Path) -> dict[str, str]:
    """Make `fault-sim` discoverable by a child process; returns the environment to add."""
    dist = site / "straind_fault_driver-1.0.dist-info"
    dist.mkdir(parents=True, exist_ok=True)
    (dist / "METADATA").write_text("Metadata-Version: 2.1\nName: straind-fault-driver\n"
                                   "Version: 1.0\n")
    (dist / "entry_points.txt").write_text(
        f"[straind.drivers]\n{ENTRY_POINT} = fault_driver:FaultSim\n")
    tests_dir = Path(__file__).resolve().parent
    path = os.pathsep.join([str(site), str(tests_dir), os.environ.get("PYTHONPATH", "")])
    return {"PYTHONPATH": path.rstrip(os.pathsep)}
