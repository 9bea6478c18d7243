"""Alarms from the configuration on scripted simulated signals: raise and clear with exact
hysteresis and hold behaviour, as events in the HDF5 file, and shown by `straind status`.

The expected transition samples follow from the rule definitions (raise after the condition
held hold_s, clear after clear_hold_s past the hysteresis band) and the sample clock: the
scripted steps are far from the thresholds compared with the simulated noise, so every
transition falls on a sample computed here from the stored values and times.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from helpers import ServiceProcess, sim_device, write_config
from straind.alarmsink import AlarmSink, rules_from_config
from straind.block import Block, EngineeringBlock, Quality
from straind.config import load_config_text
from straind.schema import ConfigError
from straind.store import read_events

RATE = 200  # samples per second: one sample every 5 ms


def _channels() -> list[dict]:
    steps = {"kind": "steps", "levels": [0, 150, 95, 85, 150, 0, 150],
             "times_s": [0, 1.0, 2.0, 3.0, 4.0, 4.3, 5.0]}
    return [
        {"name": "lc", "sensor": "bridge_transducer", "quantity": "force", "unit": "kN",
         "rated_output_mv_per_v": 2.0, "capacity": 500.0, "excitation_v": 5.0,
         "options": {"truth": steps}},
        {"name": "g", "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350,
         "bridge": "quarter", "excitation_v": 5.0,
         "options": {"truth": {"kind": "ramp", "rate_per_s": 20.0, "start_s": 1.0}}},
    ]


ALARMS = [
    {"name": "load-high", "channel": "dev0/lc", "kind": "high", "limit": 100, "hysteresis": 10,
     "hold_s": 0.5, "clear_hold_s": 0.3, "severity": "critical"},
    {"channel": "lc", "kind": "low", "limit": 50, "hysteresis": 5},
    {"name": "g-rate", "channel": "g", "kind": "rate_high", "limit": 50000, "hysteresis": 1000,
     "rate_window_s": 0.5},
]


def test_alarms_raise_and_clear_exactly_and_show_in_status(tmp_path: Path) -> None:
    cfg = write_config(tmp_path, [sim_device(_channels(), rate_hz=RATE, noise_nv_per_v=20)],
                       alarms=ALARMS)
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=int(5.9 * RATE))
        r = subprocess.run([sys.executable, "-m", "straind.cli", "status", "-c", str(cfg)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        lines = [ln for ln in r.stdout.splitlines() if ln.startswith("ALARM")]
        assert any("CRITICAL load-high" in ln and "dev0/lc high" in ln for ln in lines), r.stdout
        assert any("g-rate" in ln and "microstrain/h" in ln for ln in lines), r.stdout
        assert not any("lc.low" in ln for ln in lines)  # cleared at 5.0 s
        active = svc.command("status")["alarms"]
        assert {a["name"] for a in active} == {"load-high", "g-rate"}
        assert svc.terminate() == 0
    seg = sorted((tmp_path / "data").glob("*.h5"))[0]
    with h5py.File(seg, "r") as f:
        d = f["devices/dev0"]
        v, t = d["value"][:, 0], d["time_ns"][:]
        events = [e for e in read_events(f) if e.kind.startswith("alarm_")]

    def first(cond: np.ndarray, start: int = 0) -> int:
        return start + int(np.argmax(cond[start:]))

    # the scripted steps, found in the stored load (noise is about 0.005 kN)
    up1 = first(v > 100)             # 150 kN at 1.0 s
    band = first(v < 100, up1)       # 95 kN at 2.0 s: inside the hysteresis band (90..100]
    down = first(v <= 90, band)      # 85 kN at 3.0 s
    blip = first(v > 100, down)      # 150 kN for 0.3 s at 4.0 s: shorter than hold_s
    zero = first(v < 50, blip)       # 0 kN at 4.3 s
    up2 = first(v > 100, zero)       # 150 kN from 5.0 s
    assert band - up1 == RATE and down - band == RATE and zero - blip == int(0.3 * RATE)
    assert abs(v[up1:band] - 150).max() < 0.1 and abs(v[band:down] - 95).max() < 0.1

    high = [e for e in events if e.detail["rule"] == "load-high"]
    assert [e.kind for e in high] == ["alarm_raised", "alarm_cleared", "alarm_raised"]
    # raised 0.5 s (100 samples) after the run began; the band keeps it; cleared 0.3 s (60
    # samples) after the value came back to the clear limit 90; the 0.3 s blip does not raise
    assert high[0].time_ns == t[up1 + 100] and high[0].detail["since_ns"] == t[up1]
    assert high[1].time_ns == t[down + 60] and high[1].detail["since_ns"] == t[down]
    assert high[2].time_ns == t[up2 + 100]
    assert high[0].detail["limit"] == 100 and high[1].detail["limit"] == 90
    assert high[0].detail["value"] == pytest.approx(150, abs=0.1)
    assert high[0].detail["severity"] == "critical" and high[0].detail["unit"] == "kN"
    assert high[0].device == "dev0" and high[0].channel == "lc"

    low = [e for e in events if e.detail["rule"] == "lc.low"]
    # hold 0: raised at the very first sample (0 kN), cleared at 150 >= 55, raised at 0 kN again
    assert [e.kind for e in low] == ["alarm_raised", "alarm_cleared", "alarm_raised",
                                     "alarm_cleared"]
    assert [e.time_ns for e in low] == [t[0], t[up1], t[zero], t[up2]]

    rate = [e for e in events if e.detail["rule"] == "g-rate"]
    assert [e.kind for e in rate] == ["alarm_raised"]
    # the ramp is 20 microstrain/s = 72 000 microstrain/h; it starts at 1.0 s, so the rate
    # crosses 50 000 while its 0.5 s window still holds some of the flat start
    assert 50000 < rate[0].detail["value"] < 72000 * 1.01
    assert t[up1 - 5] < rate[0].time_ns < t[up1 + RATE // 2 + 5]
    assert rate[0].detail["unit"] == "microstrain/h"


def _eng(values: np.ndarray, quality: np.ndarray, t0_ns: int) -> EngineeringBlock:
    n = values.shape[0]
    raw = Block("d", np.zeros((n, 1), np.int32), np.zeros((n, 1), np.uint8), 0, 10_000_000, 0,
                0, 0, t0_ns=t0_ns)
    return EngineeringBlock(raw, values[:, None], quality[:, None], ("x",), ("kN",))


def test_sink_ignores_shunt_samples_and_nan() -> None:
    cfg = load_config_text(yaml.safe_dump({
        "station": {"id": "s"}, "storage": {"path": "/x"},
        "devices": [sim_device([{"name": "x", "sensor": "bridge_transducer", "quantity": "force",
                                 "unit": "kN", "rated_output_mv_per_v": 2, "capacity": 10,
                                 "excitation_v": 5,
                                 "options": {"truth": {"kind": "constant", "value": 0}}}],
                               name="d")],
        "alarms": [{"channel": "x", "kind": "high", "limit": 5}]}))
    got = []
    sink = AlarmSink(rules_from_config(cfg.data["alarms"]), got.append)
    v = np.array([1.0, 9.0, 9.0, np.nan, 1.0])
    q = np.array([0, Quality.SHUNT_ON, Quality.SHUNT_ON, Quality.SATURATED, 0], np.uint8)
    assert sink.submit(_eng(v, q, 0))
    assert got == [] and sink.active() == []  # the shunt step is not a load
    assert sink.submit(_eng(np.array([9.0, 1.0]), np.zeros(2, np.uint8), 50_000_000))
    assert [e.kind for e in got] == ["alarm_raised", "alarm_cleared"]
    assert got[0].time_ns == 50_000_000 and got[1].time_ns == 60_000_000


def _bad(alarms: list[dict]) -> ConfigError:
    doc = {"station": {"id": "s"}, "storage": {"path": "/x"},
           "devices": [sim_device(_channels(), name="a"), sim_device(_channels(), name="b")],
           "alarms": alarms}
    with pytest.raises(ConfigError) as info:
        load_config_text(yaml.safe_dump(doc, sort_keys=False))
    return info.value


def test_alarm_configuration_errors_name_the_key() -> None:
    err = _bad([{"channel": "a/lc", "kind": "high", "limit": 1},
                {"channel": "a/nope", "kind": "high", "limit": 1}])
    assert err.path == "alarms[1].channel" and "nope" in str(err) and err.line is not None
    err = _bad([{"channel": "lc", "kind": "high", "limit": 1}])
    assert err.path == "alarms[0].channel" and "several devices" in str(err)
    err = _bad([{"channel": "a/g", "kind": "rate_high", "limit": 1}])
    assert err.path == "alarms[0].rate_window_s"
    err = _bad([{"channel": "a/g", "kind": "high", "limit": 1, "rate_window_s": 2}])
    assert err.path == "alarms[0].rate_window_s"
    err = _bad([{"channel": "a/g", "kind": "high", "limit": 1},
                {"channel": "a/g", "kind": "high", "limit": 2}])
    assert err.path == "alarms[1].name" and "duplicate" in str(err)
    err = _bad([{"channel": "a/g", "kind": "above", "limit": 1}])
    assert err.path == "alarms[0].kind"
