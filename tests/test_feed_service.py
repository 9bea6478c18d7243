"""The MQTT feed through the real service: values equal the HDF5 file of the same run; remote
tare; broker outage plus a SIGKILL of straind lose nothing; the last will on SIGKILL."""

from __future__ import annotations

import json
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from helpers import ServiceProcess, sim_device, write_config
from straind.feed import decode_batch


def _chans():
    return [
        {"name": "g1", "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350,
         "bridge": "quarter", "excitation_v": 5.0,
         "options": {"truth": {"kind": "sine", "offset": 300.0, "amplitude": 40.0,
                               "frequency_hz": 0.7}}},
        {"name": "lc", "sensor": "bridge_transducer", "quantity": "force", "unit": "kN",
         "rated_output_mv_per_v": 2.0, "capacity": 10.0, "excitation_v": 10.0,
         "options": {"truth": {"kind": "constant", "value": 4.2}}},
    ]


def _config(tmp_path: Path, broker, **mqtt):
    m = {"host": broker.host, "port": broker.port, "publish_interval_s": 0.5,
         "keepalive_s": 2, "full_rate": True, "full_rate_dtype": "float64",
         "reconnect_min_s": 0.2, "reconnect_max_s": 1.0, **mqtt}
    return write_config(tmp_path, [sim_device(_chans(), rate_hz=200, noise_nv_per_v=20)],
                        mqtt=m)


def _segment_data(tmp_path: Path) -> tuple[np.ndarray, np.ndarray, list[str]]:
    times, values = [], []
    for seg in sorted((tmp_path / "data").glob("*.h5")):
        with h5py.File(seg, "r") as f:
            d = f["devices/dev0"]
            times.append(d["time_ns"][:])
            values.append(d["value"][:])
            kinds = [k.decode() for k in f["events"]["kind"]]
    return np.concatenate(times), np.concatenate(values), kinds


def test_values_and_batches_equal_the_hdf5_file(tmp_path: Path, mosquitto_broker,
                                                collector_factory) -> None:
    sub = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            ["straind/test-station/#"])
    sub.wait_connected()
    cfg = _config(tmp_path, mosquitto_broker)
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=200)
        sub.wait_for(lambda ms: sum(m.topic.endswith("values/dev0/g1") for m in ms) >= 5,
                     timeout_s=20, what="value messages")
        assert svc.terminate() == 0
    sub.wait_for(lambda ms: any(m.topic.endswith("/status") and
                                json.loads(m.payload).get("state") == "offline" for m in ms),
                 timeout_s=10, what="offline status")
    t, v, _ = _segment_data(tmp_path)
    checked = 0
    for msg in sub.on("straind/test-station/values/dev0/g1"):
        p = json.loads(msg.payload)
        sel = (t >= p["start_ns"]) & (t < p["time_ns"])
        if p["count"] == 0 or sel.sum() != p["count"]:
            continue  # an interval cut by the start or the stop of the run
        x = v[sel, 0]
        assert p["unit"] in ("microstrain", "µε")
        assert p["mean"] == pytest.approx(float(x.mean()), rel=1e-12, abs=1e-9)
        assert p["min"] == pytest.approx(float(x.min()), rel=1e-12)
        assert p["max"] == pytest.approx(float(x.max()), rel=1e-12)
        assert p["last"] == pytest.approx(float(x[-1]), rel=1e-12)
        checked += 1
    assert checked >= 3
    rows = 0
    for msg in sub.on("straind/test-station/full/dev0"):
        b = decode_batch(msg.payload)
        idx = int(np.searchsorted(t, b.first_time_ns))
        assert t[idx] == b.first_time_ns and b.period_ns == 5_000_000
        assert np.array_equal(b.values, v[idx: idx + b.values.shape[0]], equal_nan=True)
        rows += b.values.shape[0]
    assert rows >= 200


def test_remote_tare_and_bad_command(tmp_path: Path, mosquitto_broker, collector_factory) -> None:
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    sub = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            ["straind/test-station/cmd/reply"])
    sub.wait_connected()
    cfg = _config(tmp_path, mosquitto_broker, commands={"enabled": True})
    pub = mqtt.Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id="operator")
    pub.connect(mosquitto_broker.host, mosquitto_broker.port)
    pub.loop_start()
    try:
        with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
            svc.wait_ready(samples=200)
            time.sleep(0.5)
            pub.publish("straind/test-station/cmd", json.dumps(
                {"command": "tare", "args": {"channels": ["lc"]}, "correlation_id": "op-7"}), qos=1)
            pub.publish("straind/test-station/cmd", b"{not json", qos=1)
            msgs = sub.wait_for(lambda ms: len(ms) >= 2, timeout_s=20, what="two replies")
            replies = [json.loads(m.payload) for m in msgs]
            ok = next(r for r in replies if r.get("correlation_id") == "op-7")
            assert ok["ok"] is True
            bad = next(r for r in replies if r.get("correlation_id") != "op-7")
            assert bad["ok"] is False and bad["error"]
            time.sleep(0.3)
            lc = svc.command("status")["devices"]["dev0"]["last_values"]["lc"]
            assert lc == pytest.approx(0.0, abs=1e-3)  # the remote tare took effect
            assert svc.terminate() == 0
    finally:
        pub.loop_stop()
        pub.disconnect()
    _, _, kinds = _segment_data(tmp_path)
    assert "command" in kinds and "tare" in kinds


def test_outage_and_sigkill_lose_nothing(tmp_path: Path, mosquitto_broker,
                                         collector_factory) -> None:
    topic = "straind/test-station/values/dev0/lc"
    sub = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            ["straind/test-station/#"], client_id="historian")
    sub.wait_connected()
    cfg = _config(tmp_path, mosquitto_broker, full_rate=False)
    sock = tmp_path / "straind.sock"
    with ServiceProcess(cfg, sock) as svc:
        svc.wait_ready(samples=200)
        sub.wait_for(lambda ms: sum(m.topic == topic for m in ms) >= 2, timeout_s=20,
                     what="values before the outage")
        mosquitto_broker.stop()
        time.sleep(3.0)            # publishing into the outbox
        svc.kill()                 # ... and straind dies during the outage
    with ServiceProcess(cfg, sock) as svc:
        svc.wait_ready(samples=200)
        time.sleep(2.0)
        mosquitto_broker.restart()
        sub.wait_connected(20)
        time.sleep(3.0)
        assert svc.terminate() == 0
    def seqs():
        return [json.loads(m.payload)["seq"] for m in sub.on(topic)]
    sub.wait_for(lambda ms: len(set(seqs())) >= max(seqs()) + 1, timeout_s=30,
                 what="every sequence number")
    got = seqs()
    assert sorted(set(got)) == list(range(max(got) + 1))  # none lost
    # in order: a repeated number only ever repeats one already seen (duplicates are harmless)
    high = -1
    for s in got:
        assert s <= high + 1
        high = max(high, s)
    assert max(got) >= 12  # messages from before, during and after the outage


def test_last_will_on_sigkill(tmp_path: Path, mosquitto_broker, collector_factory) -> None:
    sub = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            ["straind/test-station/status"])
    sub.wait_connected()
    cfg = _config(tmp_path, mosquitto_broker, full_rate=False)
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=10)
        sub.wait_for(lambda ms: any(json.loads(m.payload).get("state") == "online" for m in ms),
                     timeout_s=20, what="online status")
        t_kill = time.monotonic()
        svc.kill()
        msgs = sub.wait_for(lambda ms: any(json.loads(m.payload).get("state") == "offline"
                                           for m in ms), timeout_s=10, what="last will")
        # keep-alive 2 s: the broker gives up after 1.5 x keep-alive and publishes the will
        assert time.monotonic() - t_kill < 6.0
        will = [json.loads(m.payload) for m in msgs if json.loads(m.payload)["state"] == "offline"]
        assert will[0]["reason"] == "connection lost"
