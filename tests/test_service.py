"""End to end through real processes: straind run -> simulated bridge -> chain -> HDF5, read by a
separate process while it is written; tare across SIGKILL; crash safety under SIGKILL."""

from __future__ import annotations

import json
import os
import random
import stat
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from helpers import ServiceProcess, sim_device, write_config
from straind.config import load_config
from straind.drivers.simulated import BridgeSimulator
from straind.supervisor import device_setup


def _gauge(name, truth, **kw):
    ch = {"name": name, "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350,
          "bridge": "quarter", "excitation_v": 5.0,
          "options": {"truth": {"kind": "constant", "value": truth}}}
    ch.update(kw)
    return ch


def _segments(tmp_path: Path) -> list[Path]:
    return sorted((tmp_path / "data").glob("*.h5"))


# Truth values for the end-to-end run; each channel is a different bridge with leads.
E2E = [
    # quarter bridge, 3-wire, 0.5 ohm leads: +1000 microstrain
    _gauge("q3", 1000.0, gauge_factor=2.05, wiring="3-wire", lead_ohm=0.5),
    # half bridge, Poisson arrangement, 120 ohm gauges, 0.3 ohm leads: -2500 microstrain
    _gauge("hp", -2500.0, gauge_factor=2.1, gauge_ohm=120, bridge="half-poisson", poisson=0.3,
           lead_ohm=0.3),
    # quarter bridge, 2-wire, 0.4 ohm leads (zero shifts; the exact inverse knows it): +12 000
    _gauge("q2", 12000.0, gauge_ohm=120, wiring="2-wire", lead_ohm=0.4),
    # full bridge, bending: -800 microstrain
    _gauge("fb", -800.0, bridge="full-bending"),
    # load cell, 2 mV/V at 10 kN, 3.3 kN applied
    {"name": "lc", "sensor": "bridge_transducer", "quantity": "force", "unit": "kN",
     "rated_output_mv_per_v": 2.0, "capacity": 10.0, "excitation_v": 10.0,
     "options": {"truth": {"kind": "constant", "value": 3.3}}},
]

READER = r"""
import sys, json, h5py, numpy as np
f = h5py.File(sys.argv[1], "r", swmr=True)
d = f["devices/dev0"]
v = d["value"]; v.refresh()
t = d["time_ns"]; t.refresh()
n = min(v.shape[0], t.shape[0])
print(json.dumps({"rows": int(n), "mean": np.nanmean(v[:n], axis=0).tolist() if n else []}))
"""


def test_end_to_end_constant_strains_read_while_writing(tmp_path: Path) -> None:
    cfg = write_config(tmp_path, [sim_device(E2E, rate_hz=500, noise_nv_per_v=20)])
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=500)
        time.sleep(0.6)  # past a flush interval
        seg = _segments(tmp_path)
        assert len(seg) == 1
        # a separate process reads the file while straind is writing it (SWMR)
        r = subprocess.run([sys.executable, "-c", READER, str(seg[0])], capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        live = json.loads(r.stdout)
        assert live["rows"] >= 500
        assert live["mean"][0] == pytest.approx(1000.0, abs=0.5)
        # run on until the driver has delivered 1500 samples: a count, not a sleep, so a slow
        # machine only makes the test longer
        svc.wait_ready(samples=1500, timeout_s=60)
        assert svc.terminate() == 0, svc.log()

    with h5py.File(seg[0], "r") as f:  # plain h5py after a clean stop
        assert f.attrs["format_version"] == 1
        d = f["devices/dev0"]
        values = d["value"][:]
        t = d["time_ns"][:]
        raw = d["raw"][:]
        assert values.shape[0] == raw.shape[0] == t.shape[0] >= 1500
        assert np.all(np.diff(t) == 2_000_000)  # 500 S/s from the sample clock, no jitter
        means = values.mean(axis=0)
        # stored strain equals the truth within the simulated noise (20 nV/V RMS -> about
        # 0.04 microstrain per sample on a GF 2 quarter bridge; the mean is far tighter)
        assert means[0] == pytest.approx(1000.0, abs=0.05)
        assert means[1] == pytest.approx(-2500.0, abs=0.05)
        assert means[2] == pytest.approx(12000.0, abs=0.05)
        assert means[3] == pytest.approx(-800.0, abs=0.05)
        assert means[4] == pytest.approx(3.3, abs=1e-4)
        std = values.std(axis=0)
        assert 0.01 < std[0] < 0.1  # the noise is there, and it is the configured size
        ch = d["channels/q2"].attrs
        assert ch["gauge_factor"] == 2.0 and ch["lead_ohm"] == 0.4 and ch["wiring"] == "2-wire"
        assert ch["unit"] == "microstrain"
        assert d["channels/lc"].attrs["unit"] == "kN"
        cfg_text = f["config"][()]
        cfg_text = cfg_text.decode() if isinstance(cfg_text, bytes) else str(cfg_text)
        assert "half-poisson" in cfg_text
        kinds = [k.decode() if isinstance(k, bytes) else k for k in f["events"]["kind"]]
        assert "config_load" in kinds and "stop" in kinds


def test_tare_survives_sigkill(tmp_path: Path) -> None:
    chans = [_gauge("g1", 500.0, options={"truth": {"kind": "constant", "value": 500.0},
                                          "gauge_ohm_offset": 0.7}),
             _gauge("g2", -300.0)]
    cfg = write_config(tmp_path, [sim_device(chans, rate_hz=200, noise_nv_per_v=10)])
    sock = tmp_path / "straind.sock"
    with ServiceProcess(cfg, sock) as svc:
        st = svc.wait_ready(samples=200)
        assert stat.S_IMODE(os.stat(sock).st_mode) == 0o600
        before = st["devices"]["dev0"]["last_values"]
        assert before["g2"] == pytest.approx(-300.0, abs=1.0)
        # the resistance offset of g1 reads as extra strain until a zero is taken
        assert abs(before["g1"] - 500.0) > 100
        r = subprocess.run([sys.executable, "-m", "straind.cli", "tare", "--all", "-c", str(cfg)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        assert "dev0/g1: zero" in r.stdout
        time.sleep(0.3)
        after = svc.command("status")["devices"]["dev0"]["last_values"]
        assert after["g1"] == pytest.approx(0.0, abs=0.5)
        assert after["g2"] == pytest.approx(0.0, abs=0.5)
        svc.kill()
    state = json.loads((tmp_path / "data" / "straind-state.json").read_text())
    zero = state["channels"]["dev0/g1"]["zero_ratio"]
    assert zero is not None and state["running"] is True  # killed: no clean stop recorded
    with ServiceProcess(cfg, sock) as svc:
        st = svc.wait_ready(samples=100)
        vals = st["devices"]["dev0"]["last_values"]
        assert vals["g1"] == pytest.approx(0.0, abs=0.5)  # continues from the same zero
        assert vals["g2"] == pytest.approx(0.0, abs=0.5)
        z = st["devices"]["dev0"]["zeros"]["g1"]
        assert z["zero_ratio"] == zero and z["origin"] == "control-socket"
        assert svc.terminate() == 0
    segs = _segments(tmp_path)
    assert len(segs) == 2  # the restart began a new segment
    with h5py.File(segs[1], "r") as f:
        assert f["devices/dev0/channels/g1"].attrs["zero_ratio"] == zero
        kinds = [k.decode() if isinstance(k, bytes) else k for k in f["events"]["kind"]]
        assert "unclean_stop" in kinds
    with h5py.File(segs[0], "r") as f:  # the killed segment opens with plain h5py
        kinds = [k.decode() if isinstance(k, bytes) else k for k in f["events"]["kind"]]
        assert kinds.count("tare") == 2


def test_sigkill_at_20_random_moments_keeps_every_flushed_sample(tmp_path: Path) -> None:
    chans = [_gauge(f"g{i}", 100.0 * (i + 1)) for i in range(4)]
    cfg = write_config(tmp_path, [sim_device(chans, rate_hz=1000, noise_nv_per_v=50)],
                       storage={"flush_interval_s": 0.1})
    sock = tmp_path / "straind.sock"
    rng = random.Random(20261202)
    floors = []
    for _ in range(20):
        with ServiceProcess(cfg, sock) as svc:
            svc.wait_ready(samples=1)
            time.sleep(rng.uniform(0.0, 0.6))
            seen = svc.command("status")["devices"]["dev0"]["samples"]
            time.sleep(0.1 + 0.3)  # one flush interval plus margin
            svc.kill()
            floors.append(seen)
    # one more clean run recovers the last killed file
    with ServiceProcess(cfg, sock) as svc:
        svc.wait_ready(samples=1)
        assert svc.terminate() == 0
    segs = _segments(tmp_path)
    assert len(segs) == 21
    config = load_config(cfg)
    sim = BridgeSimulator(device_setup(config.devices[0]), config.devices[0]["options"])
    expected, _ = sim.codes(0, max(floors) + 20_000)
    for seg, floor in zip(segs, floors):
        with h5py.File(seg, "r") as f:  # plain h5py opens every file
            d = f["devices/dev0"]
            raw = d["raw"][:]
            t = d["time_ns"][:]
            assert raw.shape[0] >= floor, (seg.name, raw.shape[0], floor)
            # a gap-free prefix of exactly what the simulated bridge produced
            assert np.array_equal(raw, expected[: raw.shape[0]])
            assert np.all(np.diff(t) == 1_000_000)
