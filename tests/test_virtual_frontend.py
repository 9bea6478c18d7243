"""The virtual front-end process -> pseudo-terminal (or TCP) -> driver -> blocks, compared
sample for sample with the simulator built from the same configuration and seed."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from straind.block import Quality
from straind.config import load_config
from straind.drivers.base import ChannelSetup, DeviceSetup, DriverIOError
from straind.drivers.serial_frames import SerialFrames
from straind.drivers.serial_lines import SerialLines
from straind.drivers.simulated import BridgeSimulator

TOOL = Path(__file__).resolve().parents[1] / "tools" / "virtual_frontend.py"

CONFIG = textwrap.dedent("""\
    station: {{id: vfe-test}}
    storage: {{path: ./data}}
    devices:
      - name: {name}
        driver: simulated-bridge
        sample_rate_hz: {rate}
        adc: {{gain: 128}}
        options: {{seed: 11, noise_nv_per_v: 40, mains_nv_per_v: 30}}
        channels:
          - name: axial
            sensor: strain_gauge
            gauge_factor: 2.1
            gauge_ohm: 350
            bridge: quarter
            excitation_v: 5
            shunt: {{ohm: 174650, arm: 1}}
            options: {{truth: {{kind: sine, amplitude: 400, frequency_hz: 3}}}}
          - name: bend
            sensor: strain_gauge
            gauge_factor: 2.0
            gauge_ohm: 120
            bridge: half-bending
            excitation_v: 2.5
            options: {{truth: {{kind: ramp, rate_per_s: 150}}}}
          - name: load
            sensor: bridge_transducer
            quantity: force
            unit: kN
            rated_output_mv_per_v: 2.0
            capacity: 50
            excitation_v: 10
            options: {{truth: {{kind: steps, levels: [0, 12.5, 25], step_s: 0.4, repeat: true}}}}
    """)


def _write_config(tmp_path: Path, rate: float = 1000.0, name: str = "rig") -> Path:
    path = tmp_path / "sim.yaml"
    path.write_text(CONFIG.format(rate=rate, name=name))
    return path


def _simulator(config: Path) -> BridgeSimulator:
    """The test's own simulator, built from the same file (not by the tool's code)."""
    dev = load_config(config).devices[0]
    chans = tuple(ChannelSetup(c["name"], i, c, c["options"])
                  for i, c in enumerate(dev["channels"]))
    setup = DeviceSetup(dev["name"], dev["sample_rate_hz"], dev["block_samples"], chans, dev)
    return BridgeSimulator(setup, dev["options"])


def _driver_setup(config: Path, block: int) -> DeviceSetup:
    dev = load_config(config).devices[0]
    chans = tuple(ChannelSetup(c["name"], i, c, {}) for i, c in enumerate(dev["channels"]))
    return DeviceSetup(dev["name"] + f"-{time.monotonic_ns()}", dev["sample_rate_hz"], block,
                       chans, dev)


class FrontEnd:
    def __init__(self, tmp_path: Path, *args: str):
        self.log_path = tmp_path / "vfe.log"
        self.err = open(tmp_path / "vfe.stderr", "w")
        self.proc = subprocess.Popen([sys.executable, str(TOOL), "--log", str(self.log_path),
                                      "--duration", "40", *args],
                                     stdout=subprocess.PIPE, stderr=self.err, text=True)
        self.path = self.readline()

    def readline(self) -> str:
        line = self.proc.stdout.readline().strip()
        assert line, f"front-end wrote nothing: {open(self.err.name).read()}"
        return line

    def log(self, kind: str) -> list[tuple[int, float]]:
        out = []
        for line in self.log_path.read_text().splitlines():
            words = line.split()
            if words and words[0] == kind:
                out.append((int(words[1]), float(words[-1][2:])))
        return out

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(5)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(5)
        self.err.close()


def _read(drv, seconds: float, min_samples: int = 0, cap_s: float = 30.0) -> list:
    """Read blocks for `seconds`, and on until `min_samples` have arrived (at most `cap_s`), so
    that a slow, loaded machine makes a test longer rather than failing a count."""
    blocks = []
    start = time.monotonic()
    got = 0
    while True:
        elapsed = time.monotonic() - start
        if elapsed >= cap_s or (elapsed >= seconds and got >= min_samples):
            return blocks
        b = drv.read_block(0.25)
        if b is not None:
            blocks.append(b)
            got += b.n_samples


def _frame_quality(q: np.ndarray, spf: int) -> np.ndarray:
    """The per-frame status the protocol carries: OR of the frame's sample flags."""
    n, m = q.shape
    f = np.bitwise_or.reduce((q & 0x47).reshape(n // spf, spf, m), axis=1)
    return np.repeat(f, spf, axis=0)


def _check_against_sim(blocks, sim: BridgeSimulator, spf: int = 1) -> None:
    assert blocks
    for b in blocks:
        codes, _ = sim.codes(b.start_index, b.n_samples)
        np.testing.assert_array_equal(b.data, codes)
        # quality: over whole frames, then cut to the block
        lo = b.start_index // spf * spf
        hi = -(-(b.start_index + b.n_samples) // spf) * spf
        expected = _frame_quality(sim.codes(lo, hi - lo)[1], spf)
        expected = expected[b.start_index - lo:b.start_index - lo + b.n_samples]
        np.testing.assert_array_equal(b.quality & ~np.uint8(Quality.AFTER_GAP), expected)


def test_frames_over_pty_equal_the_simulator_with_shunt(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path)
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--samples-per-frame", "8")
    drv = SerialFrames(_driver_setup(cfg, 100), {"port": fe.path})
    try:
        drv.open()
        blocks = _read(drv, 0.8, min_samples=800)
        drv.set_shunt(0, True)
        blocks += _read(drv, 0.6, min_samples=600)
        drv.set_shunt(0, False)
        blocks += _read(drv, 0.4, min_samples=400)
    finally:
        drv.close()
        fe.stop()
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    np.testing.assert_array_equal(idx, idx[0] + np.arange(idx.size))     # nothing lost
    assert idx.size >= 1500
    q = np.concatenate([b.quality for b in blocks])[:, 0]
    on = idx[np.flatnonzero(q & Quality.SHUNT_ON)]
    assert on.size and on[0] % 8 == 0 and np.all(np.diff(on) == 1)      # one frame-aligned run
    sim = _simulator(cfg)
    sim.set_shunt(0, True, from_index=int(on[0]))
    sim.set_shunt(0, False, from_index=int(on[-1]) + 1)
    _check_against_sim(blocks, sim, spf=8)
    shunted = np.concatenate([b.data for b in blocks])[np.isin(idx, on), 0]
    # a shunt across the active arm reads as compression: about -1000 microstrain here,
    # -Rg/(GF (Rg+Rs)) (Window, Strain Gauge Technology: shunt calibration), i.e. several
    # hundred thousand codes below the unshunted sine of +-400 microstrain
    assert shunted.max() < -200_000
    assert drv.counters.get("crc_errors", 0) == 0 and drv.counters.get("lost_frames", 0) == 0


def test_lines_over_pty_equal_the_simulator(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path, rate=400.0)
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--protocol", "lines", "--separator", ",")
    drv = SerialLines(_driver_setup(cfg, 40), {"port": fe.path, "counter": True})
    try:
        drv.open()
        blocks = _read(drv, 1.2, min_samples=400)
    finally:
        drv.close()
        fe.stop()
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    np.testing.assert_array_equal(idx, idx[0] + np.arange(idx.size))
    assert idx.size >= 300
    _check_against_sim(blocks, _simulator(cfg))
    assert drv.counters.get("bad_lines", 0) == 0


def test_tcp_socket_url(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path)
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--tcp", "0", "--no-pty")
    assert fe.path.startswith("socket://127.0.0.1:")
    drv = SerialFrames(_driver_setup(cfg, 50), {"port": fe.path})
    try:
        drv.open()
        blocks = _read(drv, 0.6)
    finally:
        drv.close()
        fe.stop()
    _check_against_sim(blocks, _simulator(cfg), spf=8)


def test_corrupted_frames_counted_exactly(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path, rate=2000.0)
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--samples-per-frame", "4",
                  "--corrupt-fraction", "0.02", "--seed", "11")
    drv = SerialFrames(_driver_setup(cfg, 200), {"port": fe.path})
    try:
        drv.open()
        blocks = _read(drv, 2.5)
        counters = dict(drv.counters)
        parsed_to = drv.frame_counter
    finally:
        drv.close()
        fe.stop()
    _check_against_sim(blocks, _simulator(cfg), spf=4)
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    first, last = int(idx[0]) // 4, int(idx[-1]) // 4
    got = np.unique(idx // 4)
    lost = np.setdiff1d(np.arange(first, last + 1), got)
    corrupted = np.array(sorted(s for s, _ in fe.log("CORRUPT")))
    inside = corrupted[(corrupted > first) & (corrupted < last)]
    assert inside.size >= 5
    np.testing.assert_array_equal(lost, inside)          # exactly the corrupted frames
    # the driver has parsed a little further than the blocks it returned (to parsed_to)
    parsed = corrupted[(corrupted > first) & (corrupted < parsed_to)]
    assert counters["lost_frames"] == parsed.size
    # corrupted frames right after the last good one may have been counted already
    after = 0
    while parsed_to + 1 + after in set(corrupted.tolist()):
        after += 1
    assert parsed.size <= counters["crc_errors"] <= parsed.size + after


def test_dropped_bytes_and_counter_wrap(tmp_path: Path) -> None:
    # frames with a byte missing (a UART overrun) are lost, every other frame is found, and
    # the frame counter wraps past 2**32 on the way
    cfg = _write_config(tmp_path, rate=1000.0)
    first_seq = (1 << 32) - 150
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--samples-per-frame", "4", "--seed", "11",
                  "--seq-start", str(first_seq), "--drop-bytes-fraction", "0.0005")
    drv = SerialFrames(_driver_setup(cfg, 100), {"port": fe.path})
    try:
        drv.open()
        blocks = _read(drv, 1.5)
    finally:
        drv.close()
        fe.stop()
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    frames = np.unique(idx // 4)
    assert frames[0] < 1 << 32 < frames[-1]                 # unwrapped across the wrap
    _check_against_sim(blocks, _simulator(cfg), spf=4)
    damaged = {s if s >= first_seq else s + (1 << 32) for s, _ in fe.log("DAMAGED")}
    lost = set(range(int(frames[0]), int(frames[-1]) + 1)) - set(frames.tolist())
    assert lost and lost == {s for s in damaged if frames[0] < s < frames[-1]}


def test_unplug_and_replug_through_a_stable_link(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path)
    link = tmp_path / "by-id-virtual-bridge"
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--link", str(link), "--samples-per-frame", "10",
                  "--vanish-after", "1.0", "--vanish-for", "1.0", "--fault-clock", "start")
    setup = _driver_setup(cfg, 50)
    blocks, faults, refused = [], [], 0
    try:
        drv = SerialFrames(setup, {"port": str(link)})
        drv.open()
        while True:
            try:
                b = drv.read_block(0.25)
            except DriverIOError as exc:
                faults.append((time.monotonic(), str(exc)))
                break
            if b is not None:
                blocks.append(b)
        drv.close()
        n_before = len(blocks)
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:          # the supervisor's loop: a new driver
            drv = SerialFrames(setup, {"port": str(link)})
            try:
                drv.open()
                break
            except DriverIOError as exc:
                refused += 1
                assert "not found" in str(exc)
                time.sleep(0.1)
        assert fe.readline() == f"PATH {os.readlink(link)}"
        blocks += _read(drv, 0.6)
        events = drv.drain_events()
        counters = dict(drv.counters)
        drv.close()
    finally:
        fe.stop()
    (vanish_seq, vanish_t), = fe.log("VANISH")
    assert faults and faults[0][0] - vanish_t < 2.0          # detected within 2 s
    assert refused >= 1                                        # absent while unplugged
    _check_against_sim(blocks, _simulator(cfg), spf=10)
    before, after = blocks[:n_before], blocks[n_before:]
    for part in (before, after):                               # nothing else lost
        idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in part])
        np.testing.assert_array_equal(idx, idx[0] + np.arange(idx.size))
    end_before = before[-1].start_index + before[-1].n_samples
    gap_samples = after[0].start_index - end_before
    assert gap_samples > 0 and after[0].quality[0, 0] & Quality.AFTER_GAP
    gaps = [e for e in events if e.kind == "gap"]
    assert len(gaps) == 1 and gaps[0].detail["samples"] == gap_samples
    assert gaps[0].detail["first_lost_index"] == end_before
    assert counters["lost_frames"] * 10 == gap_samples
    assert end_before <= vanish_seq * 10                       # lost only around the unplug


def test_stall_is_a_fault_and_streaming_resumes(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path)
    fe = FrontEnd(tmp_path, "-c", str(cfg), "--stall-after", "0.6", "--stall-for", "1.5",
                  "--fault-clock", "start")
    setup = _driver_setup(cfg, 50)
    try:
        drv = SerialFrames(setup, {"port": fe.path, "stall_timeout_s": 0.8})
        drv.open()
        blocks = []
        with pytest.raises(DriverIOError, match="stalled"):
            while True:
                b = drv.read_block(0.25)
                if b is not None:
                    blocks.append(b)
        drv.close()
        t_fault = time.monotonic()
        drv = SerialFrames(setup, {"port": fe.path, "stall_timeout_s": 3.0})
        drv.open()
        more = _read(drv, 2.2)
        drv.close()
    finally:
        fe.stop()
    (begin, t_begin), = fe.log("STALL_BEGIN")
    (end, _), = fe.log("STALL_END")
    assert t_fault - t_begin < 0.8 + 0.8                      # stall timeout plus a block
    assert more and more[0].start_index >= end * 8
    _check_against_sim(blocks + more, _simulator(cfg), spf=8)
