"""The state file: atomic, reloaded, and never silently replaced."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from straind.state import StateError, StateStore, atomic_write


def test_zero_round_trip_and_version(tmp_path: Path) -> None:
    p = tmp_path / "s.json"
    st = StateStore(p, "rig")
    st.update("dev", "g1", zero_ratio=1.25e-4, zero_taken_ns=5, zero_origin="control-socket")
    st.update("dev", "g1", zero_ratio=1.5e-4)
    again = StateStore(p, "rig")
    assert again.zeros("dev") == {"g1": 1.5e-4}
    assert again.get("dev", "g1").calibration_version == 2
    assert again.get("dev", "g1").zero_origin == "control-socket"


def test_running_flag_detects_unclean_stop(tmp_path: Path) -> None:
    p = tmp_path / "s.json"
    StateStore(p, "rig").mark_running(True)
    assert StateStore(p, "rig").unclean_previous_stop
    StateStore(p, "rig").mark_running(False)
    assert not StateStore(p, "rig").unclean_previous_stop


def test_corrupt_state_refuses_to_start(tmp_path: Path) -> None:
    p = tmp_path / "s.json"
    p.write_text("{not json")
    with pytest.raises(StateError, match="zeros"):
        StateStore(p, "rig")


def test_atomic_write_survives_kill_mid_write(tmp_path: Path) -> None:
    """A writer killed at any moment leaves the old or the new document, never a torn one."""
    p = tmp_path / "s.json"
    atomic_write(p, json.dumps({"n": -1}).encode())
    code = (
        "import json,sys\n"
        "from pathlib import Path\n"
        "from straind.state import atomic_write\n"
        "p=Path(sys.argv[1]); i=0\n"
        "while True:\n"
        "    atomic_write(p, json.dumps({'n': i, 'pad': 'x'*100000}).encode()); i+=1\n")
    for _ in range(5):
        proc = subprocess.Popen([sys.executable, "-c", code, str(p)])
        try:
            proc.wait(timeout=0.4)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        doc = json.loads(p.read_text())
        assert isinstance(doc["n"], int)
    leftovers = [x for x in os.listdir(tmp_path) if x.endswith(".tmp")]
    assert len(leftovers) <= 5  # a killed writer may leave its temp file; never the target torn
