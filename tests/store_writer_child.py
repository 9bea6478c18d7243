"""Helper process for the crash-safety test of straind.store.

Run as a script it is a small fork server: it imports numpy, h5py and straind once, then for each
line `run <directory>` on stdin forks a writer child and prints `pid <pid>`; when that child has
ended (normally: SIGKILLed by the test) it prints `exit <pid> <status>`. The child runs a real
Store (10 ms flush interval) fed with deterministic blocks as fast as it can and prints
`submitting <rows>` before each submit and `flushed <rows>` whenever the flushed row count reported
by Store.status() changes. All lines go through os.write on fd 1, so lines of the parent and the
child never interleave; the child starts only once `pid` is written, and its lines all precede
its `exit` line.

The generator functions are also imported by the test to rebuild the expected data.
"""

from __future__ import annotations

import os
import sys
import time

import numpy as np

from straind.block import Block, EngineeringBlock
from straind.events import Event
from straind.layout import ChannelLayout, DeviceLayout
from straind.store import Store

DEVICE = "rig"
N_RAW = 6
N_COLS = N_RAW + 1          # one derived column
BLOCK_ROWS = 40
PERIOD_NS = 500_000         # 2 kHz
T0_NS = 1_717_200_000 * 10**9   # 2024-06-01T00:00:00Z
MARK_EVERY = 25             # a "mark" event after every 25th block


def layout() -> DeviceLayout:
    chans = tuple(ChannelLayout(f"g{c}", c, "strain", "microstrain", True, {"gauge_factor": 2.0})
                  for c in range(N_RAW))
    chans += (ChannelLayout("sum", N_RAW, "strain", "microstrain", False, {}),)
    return DeviceLayout(DEVICE, "test-generator", 1e9 / PERIOD_NS, "int32", N_RAW, chans)


def expected(first: int, rows: int) -> dict[str, np.ndarray]:
    """Rows first .. first+rows-1 of the deterministic stream, as stored."""
    idx = np.arange(first, first + rows, dtype=np.int64)[:, None]
    col = np.arange(N_RAW, dtype=np.int64)[None, :]
    raw = ((idx * 7919 + col * 104_729) % (1 << 24) - (1 << 23)).astype(np.int32)
    value = np.empty((rows, N_COLS), dtype=np.float64)
    value[:, :N_RAW] = raw * 1e-3 + col
    value[:, N_RAW] = idx[:, 0] * 0.25
    qcol = np.arange(N_COLS, dtype=np.int64)[None, :]
    quality = np.where((idx + 3 * qcol) % 5 == 0, 8, 0).astype(np.uint8)
    return {"time_ns": T0_NS + idx[:, 0] * PERIOD_NS, "raw": raw, "value": value,
            "quality": quality}


def make_block(seq: int) -> EngineeringBlock:
    first = seq * BLOCK_ROWS
    e = expected(first, BLOCK_ROWS)
    raw = Block(DEVICE, e["raw"], np.zeros((BLOCK_ROWS, N_RAW), np.uint8), first, PERIOD_NS, seq,
                host_mono_ns=1000 + seq, host_wall_ns=2000 + seq, t0_ns=int(e["time_ns"][0]))
    lay = layout()
    return EngineeringBlock(raw, e["value"], e["quality"], lay.names, lay.units)


def _say(text: str) -> None:
    os.write(1, (text + "\n").encode())


def run_writer(directory: str, limit_s: float = 5.0) -> None:
    storage = {"path": directory, "flush_interval_s": 0.01, "queue_mb": 64,
               "segment_hours": 24, "segment_max_mb": 2048, "compression": "none",
               "value_dtype": "float64"}
    store = Store(storage, "crash", "station: {id: crash}\n", [layout()])
    store.start()
    seq = 0
    last_flushed = -1
    end = time.monotonic() + limit_s
    while time.monotonic() < end:
        block = make_block(seq)
        _say(f"submitting {(seq + 1) * BLOCK_ROWS}")
        if not store.submit(block):
            _say(f"dropped {seq}")
        if seq % MARK_EVERY == 0:
            store.record_event(Event(T0_NS + seq, "mark", DEVICE, "", {"seq": seq}, "service"))
        seq += 1
        flushed = store.status()["flushed_rows"].get(DEVICE, 0)
        if flushed != last_flushed:
            _say(f"flushed {flushed}")
            last_flushed = flushed
        time.sleep(0.0005)
    store.stop()
    _say("stopped")


def serve() -> None:
    _say("ready")
    for line in sys.stdin:
        words = line.split()
        if not words:
            continue
        if words[0] == "quit":
            break
        if words[0] == "run":
            # the child waits until `pid` is out, so that its lines never come before it
            go_r, go_w = os.pipe()
            pid = os.fork()
            if pid == 0:
                os.close(go_w)
                os.read(go_r, 1)
                os.close(go_r)
                code = 0
                try:
                    run_writer(words[1])
                except BaseException:  # noqa: BLE001 - report and leave without cleanup
                    import traceback
                    _say("error " + traceback.format_exc().replace("\n", " | "))
                    code = 1
                os._exit(code)
            os.close(go_r)
            _say(f"pid {pid}")
            os.write(go_w, b"g")
            os.close(go_w)
            _, status = os.waitpid(pid, 0)
            _say(f"exit {pid} {status}")


if __name__ == "__main__":
    serve()
