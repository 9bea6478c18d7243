"""SIGHUP reloads through a real `straind run`: an unchanged device runs on without a gap, a
changed one restarts with its zero, a changed channel set starts a new segment, and an invalid
file (or a change that needs a restart) is refused by key while the old configuration runs on."""

from __future__ import annotations

import signal
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from helpers import ServiceProcess, sim_device, write_config
from straind.block import Quality
from straind.config import load_config, load_config_text
from straind.drivers.simulated import BridgeSimulator
from straind.reload import diff_paths, plan_reload
from straind.schema import ConfigError
from straind.store import read_events
from straind.supervisor import device_setup


def _gauge(name: str, value: float) -> dict:
    return {"name": name, "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350,
            "bridge": "quarter", "excitation_v": 5.0,
            "options": {"truth": {"kind": "constant", "value": value}}}


BASE = """
station: {id: s}
storage: {path: /tmp/unused-reload}
devices:
  - name: a
    driver: simulated-bridge
    sample_rate_hz: 100
    adc: {gain: 128}
    channels:
      - {name: g1, sensor: strain_gauge, gauge_factor: 2, gauge_ohm: 350, bridge: quarter,
         excitation_v: 5, options: {truth: {kind: constant, value: 0}}}
  - name: b
    driver: simulated-bridge
    sample_rate_hz: 100
    adc: {gain: 128}
    channels:
      - {name: h1, sensor: strain_gauge, gauge_factor: 2, gauge_ohm: 350, bridge: quarter,
         excitation_v: 5, options: {truth: {kind: constant, value: 0}}}
"""


def test_plan_reload_sorts_devices_and_refuses_restart_only_keys() -> None:
    old = load_config_text(BASE)
    same = plan_reload(old, load_config_text(BASE))
    assert same.unchanged == ["a", "b"] and not same.changes_devices and same.changed_keys == []
    new = load_config_text(BASE.replace("gauge_factor: 2, gauge_ohm: 350, bridge: quarter,\n"
                                        "         excitation_v: 5, options: {truth: {kind: "
                                        "constant, value: 0}}}\n  - name: b",
                                        "gauge_factor: 2.1, gauge_ohm: 350, bridge: quarter,\n"
                                        "         excitation_v: 5, options: {truth: {kind: "
                                        "constant, value: 0}}}\n  - name: b"))
    plan = plan_reload(old, new)
    assert plan.restart == ["a"] and plan.unchanged == ["b"]
    assert plan.changed_keys == ["devices[a].channels[0].gauge_factor"]
    live = load_config_text(BASE.replace("/tmp/unused-reload}", "/tmp/unused-reload, "
                                         "low_space_mb: 7}\nclock: {sync_check: none}"))
    plan = plan_reload(old, live)
    assert sorted(plan.changed_keys) == ["clock.sync_check", "storage.low_space_mb"]
    assert not plan.changes_devices
    fixed = load_config_text(BASE.replace("/tmp/unused-reload}", "/tmp/other}"))
    with pytest.raises(ConfigError) as err:
        plan_reload(old, fixed)
    assert err.value.path == "storage.path" and "restart the service" in str(err.value)
    with pytest.raises(ConfigError) as err:
        plan_reload(old, load_config_text(BASE.replace("{id: s}", "{id: t}")))
    assert err.value.path == "station.id"
    assert diff_paths({"x": [1, {"y": 2}]}, {"x": [1, {"y": 3}], "z": 0}) == ["x[1].y", "z"]


def _wait_count(svc: ServiceProcess, kind: str, n: int, timeout_s: float = 20) -> dict:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        st = svc.command("status")
        if st["counters"]["events"].get(kind, 0) >= n:
            return st
        time.sleep(0.05)
    raise AssertionError(f"no {n}th {kind} event in {timeout_s} s:\n{svc.log()[-3000:]}")


def _events(path: Path) -> list:
    with h5py.File(path, "r") as f:
        return read_events(f)


def test_sighup_valid_and_invalid_configurations(tmp_path: Path) -> None:
    a = sim_device([_gauge("g1", 400.0), _gauge("g2", -100.0)], rate_hz=200, name="a",
                   noise_nv_per_v=30)
    b = sim_device([_gauge("h1", 50.0)], rate_hz=100, name="b", noise_nv_per_v=30)
    cfg_path = write_config(tmp_path, [a, b])
    original = load_config(cfg_path)
    sock = tmp_path / "straind.sock"

    def rewrite(change) -> None:
        d = yaml.safe_load(cfg_path.read_text())
        change(d)
        cfg_path.write_text(yaml.safe_dump(d, sort_keys=False))

    with ServiceProcess(cfg_path, sock) as svc:
        svc.wait_ready(samples=100)
        tare = svc.command("tare", {"channels": ["a/g1"], "seconds": 0.2})
        zero = tare["a/g1"]["new_zero_ratio"]

        # 1. only device b changes (a driver option): b restarts, a runs on untouched
        rewrite(lambda d: d["devices"][1]["options"].update(noise_nv_per_v=60))
        svc.proc.send_signal(signal.SIGHUP)
        st = _wait_count(svc, "config_load", 2)
        ev = [e for e in st["recent_events"] if e["kind"] == "config_load"][-1]["detail"]
        assert ev["devices_restarted"] == ["b"] and ev["devices_unchanged"] == ["a"]
        assert ev["changed_keys"] == ["devices[b].options.noise_nv_per_v"]
        assert ev["new_segment"] is False and "noise_nv_per_v: 60" in ev["config_text"]
        samples_b = st["devices"]["b"]["samples"]

        # 2. device a gets a third channel: a restarts, a new segment starts, g1 keeps its zero
        rewrite(lambda d: d["devices"][0]["channels"].append(_gauge("g3", 250.0)))
        svc.proc.send_signal(signal.SIGHUP)
        st = _wait_count(svc, "config_load", 3)
        ev = [e for e in st["recent_events"] if e["kind"] == "config_load"][-1]["detail"]
        assert ev["devices_restarted"] == ["a"] and ev["new_segment"] is True
        st = svc.wait_ready(samples=50)
        assert st["devices"]["a"]["zeros"]["g1"]["zero_ratio"] == zero
        assert st["devices"]["a"]["last_values"]["g1"] == pytest.approx(0.0, abs=1.0)
        assert st["devices"]["a"]["last_values"]["g3"] == pytest.approx(250.0, abs=1.0)
        assert st["devices"]["b"]["samples"] > samples_b       # b was not touched this time

        # 3. an invalid file: refused, naming the key; the running configuration stays
        good_text = cfg_path.read_text()
        rewrite(lambda d: d["devices"][0]["channels"][1].update(gauge_factor="two"))
        svc.proc.send_signal(signal.SIGHUP)
        st = _wait_count(svc, "config_rejected", 1)
        rej = [e for e in st["recent_events"] if e["kind"] == "config_rejected"][-1]["detail"]
        assert rej["key"] == "devices[0].channels[1].gauge_factor"
        assert "devices[0].channels[1].gauge_factor" in svc.log()
        # 4. a key that needs a restart: refused too
        cfg_path.write_text(good_text)
        rewrite(lambda d: d["storage"].update(flush_interval_s=0.5))
        svc.proc.send_signal(signal.SIGHUP)
        st = _wait_count(svc, "config_rejected", 2)
        rej = [e for e in st["recent_events"] if e["kind"] == "config_rejected"][-1]["detail"]
        assert rej["key"] == "storage.flush_interval_s"
        before = st["devices"]["a"]["samples"]
        st = svc.wait_ready(samples=before + 40)                # still acquiring, 3 channels
        assert list(st["devices"]["a"]["units"]) == ["g1", "g2", "g3"]
        assert svc.terminate() == 0, svc.log()

    segs = sorted((tmp_path / "data").glob("*.h5"), key=lambda p: p.stat().st_mtime)
    assert len(segs) == 2
    sim_a = BridgeSimulator(device_setup(original.devices[0]), original.devices[0]["options"])
    with h5py.File(segs[0], "r") as f:
        raw_a = f["devices/a/raw"][:]
        assert raw_a.shape[1] == 2
        # device a ran through the first reload untouched: one gap-free run of its samples
        expected, _ = sim_a.codes(0, raw_a.shape[0])
        assert np.array_equal(raw_a, expected)
        assert np.all(np.diff(f["devices/a/time_ns"][:]) == 5_000_000)
        blocks_b = f["devices/b/blocks"][:]
        q_b = f["devices/b/quality"][:]
        restart = np.flatnonzero(np.diff(blocks_b["start_index"]) < 0)
        assert len(restart) == 1                                 # b began counting again
        first_after = int(blocks_b["row"][restart[0] + 1])
        assert q_b[first_after, 0] & Quality.AFTER_GAP
        t_b = f["devices/b/time_ns"][:]
        assert np.all(np.diff(t_b) > 0)
    kinds0 = [(e.kind, e.device) for e in _events(segs[0])]
    assert ("gap", "b") in kinds0 and ("gap", "a") not in kinds0
    with h5py.File(segs[1], "r") as f:
        assert f.attrs["start_reason"] == "new_segment"
        assert f["devices/a/raw"].shape[1] == 3
        assert list(f["devices/a"].attrs["columns"]) == ["g1", "g2", "g3"]
        text = f["config"][()]
        text = text.decode() if isinstance(text, bytes) else str(text)
        assert "g3" in text and "noise_nv_per_v: 60" in text
        assert f["devices/a/channels/g1"].attrs["zero_taken_ns"] > 0   # the zero came along
    ev1 = _events(segs[1])
    rejected = [e.detail["key"] for e in ev1 if e.kind == "config_rejected"]
    assert rejected == ["devices[0].channels[1].gauge_factor", "storage.flush_interval_s"]
    assert [e.detail["devices_restarted"] for e in ev1 if e.kind == "config_load"] == [["a"]]


def test_reload_with_a_new_channel_restarts_the_feed(tmp_path: Path, mosquitto_broker,
                                                     collector_factory) -> None:
    import json
    sub = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            ["straind/test-station/#"])
    sub.wait_connected()
    mqtt = {"host": mosquitto_broker.host, "port": mosquitto_broker.port,
            "publish_interval_s": 0.2, "reconnect_min_s": 0.2, "reconnect_max_s": 1.0}
    cfg_path = write_config(tmp_path, [sim_device([_gauge("g1", 10.0)], rate_hz=100)],
                            mqtt=mqtt)
    with ServiceProcess(cfg_path, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=50)
        sub.wait_for(lambda ms: any(m.topic.endswith("values/dev0/g1") for m in ms),
                     what="values of g1")
        d = yaml.safe_load(cfg_path.read_text())
        d["devices"][0]["channels"].append(_gauge("g2", 20.0))
        cfg_path.write_text(yaml.safe_dump(d, sort_keys=False))
        svc.proc.send_signal(signal.SIGHUP)
        _wait_count(svc, "config_load", 2)
        msgs = sub.wait_for(lambda ms: any(m.topic.endswith("values/dev0/g2") for m in ms),
                            timeout_s=20, what="values of the new channel")
        assert svc.terminate() == 0
    metas = [json.loads(m.payload) for m in msgs if m.topic.endswith("/meta")]
    names = [[c["name"] for c in dev["channels"]] for m in metas for dev in m["devices"]]
    assert ["g1"] in names and ["g1", "g2"] in names          # republished with the new layout
    states = [json.loads(m.payload).get("state") for m in msgs if m.topic.endswith("/status")]
    assert "offline" in states and states.index("offline") < len(states) - 1
    g2 = [json.loads(m.payload) for m in msgs if m.topic.endswith("values/dev0/g2")]
    assert g2[-1]["mean"] == pytest.approx(20.0, abs=1.0)
