"""The MQTT feed against a real Mosquitto broker (see conftest.py).

Run as a script this file is the small publishing process used by the kill tests:
    python tests/test_feed.py --child --host H --port P --outbox DIR --start-index N
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np

import pytest

from straind.block import UNUSABLE, Block, EngineeringBlock, Quality
from straind.events import make_event
from straind.feed import (MQTT_SECTION, CommandError, Feed, decode_batch, encode_batch,
                          redact_config_text, redact_secrets, summarise)
from straind.layout import ChannelLayout, DeviceLayout
from straind.schema import ConfigError, validate

T0_NS = 1_700_000_000_123_000_000        # 0.123 s past a whole second: blocks straddle intervals
STATION = "rig7"
PREFIX = "plant"


def make_layout(name: str = "bridge0", rate_hz: float = 1000.0) -> DeviceLayout:
    chans = (ChannelLayout("sg1", 0, "strain", "µε", attrs={"gauge_factor": 2.05, "bridge": "quarter"}),
             ChannelLayout("sg2", 1, "strain", "µε", attrs={"gauge_factor": 2.1, "bridge": "half-bending"}),
             ChannelLayout("load", 2, "force", "kN", attrs={"calibration_version": 3}))
    return DeviceLayout(name, "simulated-bridge", rate_hz, "int32", 3, chans)


def make_block(layout: DeviceLayout, start_index: int, values: np.ndarray,
               quality: np.ndarray | None = None, t0_ns: int | None = None) -> EngineeringBlock:
    n, k = values.shape
    q = np.zeros((n, k), np.uint8) if quality is None else quality
    period = layout.period_ns
    raw = Block(layout.name, np.zeros((n, k), np.int32), q, start_index, period, start_index // max(n, 1),
                time.monotonic_ns(), time.time_ns(),
                (T0_NS + start_index * period) if t0_ns is None else t0_ns)
    return EngineeringBlock(raw, values, q, layout.names, layout.units)


def feed_config(broker, tmp_path, **over) -> dict:
    cfg = {"host": broker.host, "port": broker.port, "topic_prefix": PREFIX,
           "keepalive_s": 5, "reconnect_min_s": 0.2, "reconnect_max_s": 1.0,
           "publish_interval_s": 0.5, "outbox": {"path": str(tmp_path / "outbox"),
                                                 "sync_interval_s": 0.2}}
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(cfg.get(key), dict):
            cfg[key] = {**cfg[key], **value}
        else:
            cfg[key] = value
    return cfg


def health() -> dict:
    return {"samples_per_s": 1000.0, "drops": 0, "queue_depth": 0, "disk_free_bytes": 10**9,
            "clock": "synchronised"}


@pytest.fixture
def feeds():
    made: list[Feed] = []

    def make(cfg: dict, devices=None, **kw) -> Feed:
        f = Feed(cfg, STATION, devices if devices is not None else [make_layout()],
                 {"site": "hall 2", "operator": "test"}, kw.pop("status_provider", health), **kw)
        made.append(f)
        f.start()
        return f

    yield make
    for f in made:
        f.stop(timeout_s=1.0)


def wait_until(pred, timeout_s: float = 10.0, what: str = "condition"):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = pred()
        if value:
            return value
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


def base(topic: str = "") -> str:
    return f"{PREFIX}/{STATION}/{topic}" if topic else f"{PREFIX}/{STATION}"


def unique_in_order(msgs, key=lambda m: json.loads(m.payload)["seq"]):
    """First occurrences of each seq, after checking every repeat is byte-identical."""
    seen: dict[int, bytes] = {}
    order = []
    for m in msgs:
        s = key(m)
        if s in seen:
            assert seen[s] == m.payload, f"seq {s} repeated with a different payload"
            continue
        seen[s] = m.payload
        order.append(s)
    return order, seen


# ------------------------------------------------------------------------------- pure parts

def test_schema_defaults_and_errors():
    cfg = validate(MQTT_SECTION, {"host": "broker.plant", "protocol": 5}, "mqtt")
    assert cfg["protocol"] == "5" and cfg["qos"] == 1 and cfg["publish_interval_s"] == 1.0
    assert cfg["tls"]["verify_hostname"] is True and cfg["commands"]["enabled"] is False
    assert validate(MQTT_SECTION, {"protocol": "3.1.1"})["protocol"] == "3.1.1"
    assert validate(MQTT_SECTION, {"tls": {"ca_file": "/x"}})["tls"]["enabled"] is True
    with pytest.raises(ConfigError, match="mqtt.protocol"):
        validate(MQTT_SECTION, {"protocol": 4}, "mqtt")
    with pytest.raises(ConfigError, match="only one of"):
        validate(MQTT_SECTION, {"username": "u", "password": "p", "password_env": "E"}, "mqtt")
    with pytest.raises(ConfigError, match="mqtt.qos"):
        validate(MQTT_SECTION, {"qos": 2}, "mqtt")
    with pytest.raises(ConfigError, match="mqtt.full_rate"):
        validate(MQTT_SECTION, {"full_rate": "yes"}, "mqtt")


def test_redact_secrets_and_text():
    config = {"station": {"id": "s"}, "mqtt": {"username": "u", "password": "hunter2",
                                              "password_file": "/etc/pw", "tls": {"ca_file": "c"}}}
    red = redact_secrets(config)
    assert red["mqtt"]["password"] == "<redacted>"
    assert red["mqtt"]["password_file"] == "/etc/pw" and red["mqtt"]["username"] == "u"
    assert config["mqtt"]["password"] == "hunter2"          # the original is untouched
    assert "hunter2" not in json.dumps(red)
    text = "mqtt:\n  username: u\n  password: \"hunter2\"  # inline\n  password_file: /etc/pw\n"
    out = redact_config_text(text)
    assert "hunter2" not in out and "password_file: /etc/pw" in out and "username: u" in out


def test_batch_codec_roundtrip_and_rejects_garbage():
    vals = np.arange(12, dtype=np.float64).reshape(4, 3) / 4
    vals[1, 2] = np.nan
    q = np.zeros((4, 3), np.uint8)
    q[1, 2] = int(Quality.SATURATED)
    msg = encode_batch(7, T0_NS, 1_000_000, 42, vals, q, "float64", layout_crc=0xDEADBEEF)
    b = decode_batch(msg)
    assert (b.seq, b.first_time_ns, b.period_ns, b.start_index, b.layout_crc) == \
        (7, T0_NS, 1_000_000, 42, 0xDEADBEEF)
    np.testing.assert_array_equal(b.values, vals)
    np.testing.assert_array_equal(b.quality, q)
    assert len(msg) == 52 + 12 * 8 + 12
    # the documented layout, read with struct by hand (as a subscriber in another language)
    import struct
    assert msg[:4] == b"SDFB" and msg[4] == 1 and msg[5] == 3
    assert struct.unpack_from("<H", msg, 6)[0] == 52
    assert struct.unpack_from("<IHHI", msg, 40) == (4, 3, 0, 0xDEADBEEF)
    assert struct.unpack_from("<d", msg, 52 + 8 * 4)[0] == vals[1, 1]
    assert msg[52 + 12 * 8 + 5] == int(Quality.SATURATED)      # quality row-major after values
    # float32 without quality: 4-byte little-endian IEEE 754 values, nothing after them
    msg32 = encode_batch(8, T0_NS, 1_000_000, 46, vals, None, "float32")
    assert len(msg32) == 52 + 12 * 4 and msg32[5] == 0
    assert struct.unpack_from("<12f", msg32, 52)[4] == np.float32(vals[1, 1])
    assert np.isnan(struct.unpack_from("<f", msg32, 52 + 4 * 5)[0])
    b32 = decode_batch(msg32)
    assert b32.quality is None
    np.testing.assert_array_equal(b32.values, vals.astype(np.float32))
    with pytest.raises(ValueError):
        decode_batch(b"SDFX" + msg[4:])
    with pytest.raises(ValueError):
        decode_batch(msg[:-1])


def test_summarise_splits_at_interval_boundaries():
    v = np.arange(10, dtype=np.float64).reshape(10, 1)
    parts = summarise(v, np.zeros((10, 1), np.uint8), t0_ns=7, period_ns=1, interval_ns=5)
    # samples at t=7..16: intervals [5,10) -> 3 samples, [10,15) -> 5, [15,20) -> 2
    assert [p.index for p in parts] == [1, 2, 3]
    assert [int(p.count[0]) for p in parts] == [3, 5, 2]
    assert [float(p.last[0]) for p in parts] == [2.0, 7.0, 9.0]


def test_any_bit_set_sees_one_bit_anywhere():
    from straind.feed import _any_bit_set
    q = np.zeros((1000, 32), np.uint8)
    assert not _any_bit_set(q) and not _any_bit_set(q[::3, 1:5])
    for r, c, bit in ((0, 0, 1), (999, 31, 128), (517, 9, 8)):
        q[r, c] = bit
        assert _any_bit_set(q) and _any_bit_set(q[r:r + 1, c:c + 1])
        assert not _any_bit_set(np.delete(q, r, axis=0))     # and only because of that one
        q[r, c] = 0


@pytest.mark.parametrize("n", [1, 7, 39, 40, 41, 1000, 1013])
def test_column_reductions_equal_numpy_along_the_columns(n):
    from straind.feed import _column_sum_min_max
    values = np.random.default_rng(n).normal(0.0, 1e3, size=(n, 5))
    total, vmin, vmax = _column_sum_min_max(values)
    # numpy's own reductions along axis 0 are the reference; the sum only to rounding
    np.testing.assert_allclose(total, values.sum(axis=0), rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(vmin, values.min(axis=0))
    np.testing.assert_array_equal(vmax, values.max(axis=0))


def test_merged_parts_equal_the_statistics_of_all_their_samples():
    from straind.feed import EXCLUDE_FROM_STATS, merge_stats
    rng = np.random.default_rng(11)
    n, k, period = 400, 4, 10
    values = rng.normal(0.0, 50.0, size=(n, k))
    quality = np.zeros((n, k), np.uint8)
    values[rng.integers(0, n, 30), 0] = np.nan            # scattered unusable samples
    quality[rng.integers(0, n, 20), 1] = int(UNUSABLE)
    values[150:, 2] = np.nan                                # no usable sample in later parts
    values[:, 3] = np.nan                                   # never a usable sample
    # the same interval cut into uneven blocks, summarised part by part, then merged
    cuts = [0, 7, 60, 61, 200, 333, n]
    parts = []
    for a, b in zip(cuts[:-1], cuts[1:]):
        parts += summarise(values[a:b], quality[a:b], t0_ns=a * period, period_ns=period,
                           interval_ns=10**12)
    merged = merge_stats(parts)
    # reference: each column's statistics taken directly over all its usable samples
    good = np.isfinite(values) & ((quality & EXCLUDE_FROM_STATS) == 0)
    times = np.arange(n) * period
    for j in range(k):
        g = good[:, j]
        assert int(merged.count[j]) == g.sum() and int(merged.unusable[j]) == n - g.sum()
        if g.any():
            np.testing.assert_allclose(merged.total[j], values[g, j].sum(), rtol=1e-12)
            assert merged.vmin[j] == values[g, j].min() and merged.vmax[j] == values[g, j].max()
            assert merged.last[j] == values[g, j][-1]
            assert merged.last_ns[j] == times[g][-1]
        else:
            assert np.isnan(merged.last[j]) and merged.last_ns[j] == -1
    assert int(merged.flags[1]) == int(UNUSABLE) and int(merged.flags[0]) == 0
    assert (merged.first_ns, merged.end_ns) == (0, (n - 1) * period)


# ------------------------------------------------------------------------- against the broker

def oracle(values: np.ndarray, quality: np.ndarray, interval_ns: int, period_ns: int):
    """Per interval and channel statistics computed directly from the submitted arrays."""
    times = T0_NS + np.arange(values.shape[0], dtype=np.int64) * period_ns
    idx = times // interval_ns
    excluded = int(UNUSABLE | Quality.SHUNT_ON)
    out = {}
    for k in np.unique(idx):
        rows = idx == k
        for j in range(values.shape[1]):
            v = values[rows, j]
            q = quality[rows, j]
            t = times[rows]
            good = np.isfinite(v) & ((q & excluded) == 0)
            n = int(good.sum())
            out[(int(k), j)] = {
                "count": n, "unusable": int(rows.sum()) - n,
                "mean": float(v[good].sum() / n) if n else None,
                "min": float(v[good].min()) if n else None,
                "max": float(v[good].max()) if n else None,
                "last": float(v[good][-1]) if n else None,
                "last_ns": int(t[good][-1]) if n else None,
                "quality_bits": int(np.bitwise_or.reduce(q)),
            }
    return out


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_values_and_full_rate_arrive_exactly(protocol, mosquitto_broker, collector_factory,
                                             feeds, tmp_path):
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("#")],
                            protocol=protocol)
    col.wait_connected()
    layout = make_layout()
    rng = np.random.default_rng(5)
    n_blocks, rows = 8, 250
    # multiples of 1/64: every partial sum is exact, so the mean is exact whatever the order
    values = rng.integers(-64000, 64000, size=(n_blocks * rows, 3)) / 64.0
    quality = np.zeros(values.shape, np.uint8)
    values[[3, 400, 401, 1999], 0] = np.nan
    values[17, 0] = np.inf
    quality[[5, 600, 1200], 1] = int(Quality.SATURATED)
    quality[877:1377, 1] |= int(Quality.INVALID)     # the whole interval [877, 1377) of sg2
    quality[50:90, 2] = int(Quality.SHUNT_ON)
    quality[1500, 2] = int(Quality.AFTER_GAP)        # usable but flagged
    feed = feeds(feed_config(mosquitto_broker, tmp_path, protocol=protocol, full_rate=True,
                             full_rate_dtype="float64"), [layout])
    wait_until(lambda: feed.status()["connected"], what="feed connected")
    for b in range(n_blocks):
        sl = slice(b * rows, (b + 1) * rows)
        assert feed.submit(make_block(layout, b * rows, values[sl].copy(), quality[sl].copy()))
    feed.stop()

    expected = oracle(values, quality, 500_000_000, layout.period_ns)
    n_intervals = len({k for k, _ in expected})
    assert n_intervals == 5
    topics = [base(f"values/bridge0/{c}") for c in layout.names]
    col.wait_for(lambda ms: all(sum(m.topic == t for m in ms) >= n_intervals for t in topics)
                 and any(m.topic == base("status") and b'"offline"' in m.payload for m in ms),
                 what="all value messages and the offline status")
    for j, (name, topic) in enumerate(zip(layout.names, topics)):
        docs = [json.loads(m.payload) for m in col.on(topic)]
        assert [d["seq"] for d in docs] == list(range(n_intervals))
        for d in docs:
            k = d["start_ns"] // 500_000_000
            exp = expected[(k, j)]
            assert d["time_ns"] == (k + 1) * 500_000_000 and d["interval_s"] == 0.5
            assert d["time"].endswith("Z") and d["time"].startswith("2023-11-14T22:13:")
            assert d["unit"] == layout.channels[j].unit
            assert d["quantity"] == layout.channels[j].quantity
            for key in ("count", "unusable", "mean", "min", "max", "last", "last_ns",
                        "quality_bits"):
                assert d[key] == exp[key], (name, k, key, d[key], exp[key])
            assert d["quality"] == ("bad" if exp["count"] == 0 else
                                    "good" if exp["quality_bits"] == 0 and exp["unusable"] == 0
                                    else "uncertain")
    # the interval where sg2 was invalid throughout reports no numbers at all
    sg2 = [json.loads(m.payload) for m in col.on(topics[1])]
    assert any(d["count"] == 0 and d["mean"] is None and d["quality"] == "bad" for d in sg2)
    assert any("after_gap" in json.loads(m.payload)["flags"] for m in col.on(topics[2]))

    # full rate: every sample and quality byte, in order, with times from the sample clock
    batches = [decode_batch(m.payload) for m in col.on(base("full/bridge0"))]
    assert [b.seq for b in batches] == list(range(n_blocks))
    got = np.concatenate([b.values for b in batches])
    np.testing.assert_array_equal(got, values)
    np.testing.assert_array_equal(np.concatenate([b.quality for b in batches]), quality)
    assert [b.start_index for b in batches] == [i * rows for i in range(n_blocks)]
    assert [b.first_time_ns for b in batches] == [T0_NS + i * rows * 1_000_000 for i in range(n_blocks)]

    meta = [m for m in col.on(base("meta"))]
    assert meta
    md = json.loads(meta[-1].payload)
    dev = md["devices"][0]
    assert [c["unit"] for c in dev["channels"]] == ["µε", "µε", "kN"]
    assert dev["channels"][0]["attrs"]["gauge_factor"] == 2.05
    assert md["metadata"]["site"] == "hall 2"
    assert dev["full_rate_topic"] == base("full/bridge0")
    assert md["layout_crc"] == batches[0].layout_crc
    status = [json.loads(m.payload) for m in col.on(base("status"))]
    assert status[0]["state"] == "online" and status[0]["health"]["clock"] == "synchronised"
    assert status[0]["health"]["feed"]["broker"] == "connected"
    assert status[-1]["state"] == "offline" and status[-1]["reason"] == "shutdown"
    assert feed.status()["dropped"]["queue_full"] == 0


def pattern(start_index: int, n: int, k: int = 3) -> np.ndarray:
    """Deterministic values from the sample counter, so any message can be checked alone."""
    i = np.arange(start_index, start_index + n, dtype=np.float64)[:, None]
    return (i % 1000) / 8 + np.arange(k)[None, :] * 1000.0


def check_full_stream(msgs, rows: int) -> list[int]:
    """Full-rate messages: seq contiguous from 0 in first-arrival order, payloads consistent."""
    order, seen = unique_in_order(msgs, key=lambda m: decode_batch(m.payload).seq)
    assert order == list(range(len(order))), "a sequence number is missing or out of order"
    starts = []
    for s in order:
        b = decode_batch(seen[s])
        np.testing.assert_array_equal(b.values, pattern(b.start_index, b.n_samples,
                                                        b.values.shape[1]).astype(b.values.dtype))
        starts.append(b.start_index)
    return starts


def test_broker_outage_loses_nothing(mosquitto_broker, collector_factory, feeds, tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="straind.feed")
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("#")],
                            client_id="historian-1")
    col.wait_connected()
    layout = make_layout()
    feed = feeds(feed_config(mosquitto_broker, tmp_path, full_rate=True), [layout])
    wait_until(lambda: feed.status()["connected"], what="feed connected")
    rows = 50
    n_sent = 0
    outage_status = {}

    def produce(seconds: float) -> None:
        nonlocal n_sent
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            start = n_sent * rows
            assert feed.submit(make_block(layout, start, pattern(start, rows)))
            n_sent += 1
            if n_sent % 40 == 0:
                feed.record_event(make_event("mark", origin="service", n=n_sent))
            time.sleep(0.05)

    produce(1.5)
    mosquitto_broker.stop()
    produce(4.0)
    outage_status = feed.status()
    produce(4.0)                       # about 8 s without a broker
    mosquitto_broker.start()
    produce(1.5)
    wait_until(lambda: feed.status()["outbox"]["depth"] == 0, 15, "outbox drained")
    feed.stop()

    assert outage_status["broker"] == "unreachable" and not outage_status["connected"]
    assert outage_status["outbox"]["depth"] > 50
    assert outage_status["oldest_unsent_age_s"] > 2
    col.wait_for(lambda ms: sum(m.topic == base("full/bridge0") for m in ms) >= n_sent,
                 20, "every full-rate message")
    starts = check_full_stream(col.on(base("full/bridge0")), rows)
    assert starts == [i * rows for i in range(n_sent)]
    for c in layout.names:
        order, _ = unique_in_order(col.on(base(f"values/bridge0/{c}")))
        assert order == list(range(len(order))) and len(order) >= 10
    ev_order, ev = unique_in_order(col.on(base("events")))
    assert ev_order == list(range(n_sent // 40))
    assert [json.loads(ev[s])["detail"]["n"] for s in ev_order] == [40 * (i + 1) for i in ev_order]
    unreachable = [r for r in caplog.records if "unreachable" in r.getMessage()]
    assert len(unreachable) == 1, [r.getMessage() for r in unreachable]
    assert unreachable[0].levelno == logging.WARNING
    assert f"{mosquitto_broker.host}:{mosquitto_broker.port}" in unreachable[0].getMessage()


def start_child(broker, outbox: str, start_index: int, keepalive_s: int = 5,
                sync_interval_s: float = 0.2) -> subprocess.Popen:
    proc = subprocess.Popen([sys.executable, os.path.abspath(__file__), "--child",
                             "--host", broker.host, "--port", str(broker.port),
                             "--outbox", outbox, "--start-index", str(start_index),
                             "--keepalive", str(keepalive_s),
                             "--sync-interval", str(sync_interval_s)],
                            stdout=subprocess.PIPE, text=True)
    line = proc.stdout.readline()
    assert line.strip() == "started", f"child did not start: {line!r}"
    return proc


def test_sigkill_and_restart_during_outage_loses_nothing(mosquitto_broker, collector_factory,
                                                         tmp_path):
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("#")],
                            client_id="historian-2")
    col.wait_connected()
    outbox = str(tmp_path / "child-outbox")
    # the first child never writes its state file after start: what the second child knows
    # (acknowledged position, sequence counters) must come from the log itself
    first = start_child(mosquitto_broker, outbox, 0, sync_interval_s=3600)
    try:
        col.wait_for(lambda ms: sum(m.topic == base("full/bridge0") for m in ms) >= 10,
                     what="first child's data")
        mosquitto_broker.stop()
        time.sleep(2.0)                       # the first child fills its outbox
    finally:
        first.send_signal(signal.SIGKILL)
        first.wait(10)
    second = start_child(mosquitto_broker, outbox, 10_000_000)
    try:
        time.sleep(2.0)                       # the second child appends behind the first's data
        mosquitto_broker.start()
        time.sleep(2.5)
    finally:
        second.send_signal(signal.SIGTERM)
        out, _ = second.communicate(timeout=20)
    assert second.returncode == 0
    final = json.loads(out.strip().splitlines()[-1])
    n_total = final["next_seq"]
    assert final["outbox_depth"] == 0
    col.wait_for(lambda ms: len({decode_batch(m.payload).seq for m in ms
                                 if m.topic == base("full/bridge0")}) >= n_total,
                 20, "every full-rate message of both children")
    starts = check_full_stream(col.on(base("full/bridge0")), 50)
    assert len(starts) == n_total
    firsts = [s for s in starts if s < 10_000_000]
    seconds = [s for s in starts if s >= 10_000_000]
    assert starts == firsts + seconds                      # in order: first child's data first
    assert firsts == [i * 50 for i in range(len(firsts))]  # nothing missing up to the kill
    assert seconds == [10_000_000 + i * 50 for i in range(len(seconds))]
    assert len(firsts) > 40 and len(seconds) > 40


def test_last_will_on_sigkill(mosquitto_broker, collector_factory, tmp_path):
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("status")])
    col.wait_connected()
    child = start_child(mosquitto_broker, str(tmp_path / "ob"), 0, keepalive_s=2)
    try:
        col.wait_for(lambda ms: any(json.loads(m.payload)["state"] == "online" for m in ms),
                     what="online status")
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(10)
    # the broker publishes the will after 1.5 keep-alive periods without traffic (3 s here)
    msgs = col.wait_for(lambda ms: json.loads(ms[-1].payload)["state"] == "offline", 10,
                        "the last will")
    will = json.loads(msgs[-1].payload)
    assert will["reason"] == "connection lost" and will["last_will"] is True
    assert will["station"] == STATION


# ------------------------------------------------------------------------ TLS and passwords

def openssl(*args: str, cwd: str) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def make_ca(d: str, name: str) -> None:
    openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
            "-keyout", f"{name}.key", "-out", f"{name}.crt", "-days", "2", "-subj", f"/CN={name}",
            cwd=d)


def make_server_cert(d: str, ca: str, dns: str) -> None:
    openssl("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
            "-keyout", "server.key", "-out", "server.csr", "-subj", f"/CN={dns}", cwd=d)
    with open(os.path.join(d, "ext.cnf"), "w") as fh:
        fh.write(f"subjectAltName=DNS:{dns}\nbasicConstraints=CA:FALSE\n"
                 "keyUsage=digitalSignature,keyEncipherment\nextendedKeyUsage=serverAuth\n")
    openssl("x509", "-req", "-in", "server.csr", "-CA", f"{ca}.crt", "-CAkey", f"{ca}.key",
            "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", "ext.cnf", cwd=d)


def test_tls_ca_and_hostname_checks(broker_factory, collector_factory, feeds, tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="straind.feed")
    d = str(tmp_path / "pki")
    os.makedirs(d)
    make_ca(d, "plant-ca")
    make_ca(d, "other-ca")
    make_server_cert(d, "plant-ca", "localhost")
    broker = broker_factory("tls-broker", tls={"ca_file": f"{d}/plant-ca.crt",
                                               "cert_file": f"{d}/server.crt",
                                               "key_file": f"{d}/server.key"})
    col = collector_factory("localhost", broker.port, [base("status")], tls_ca=f"{d}/plant-ca.crt")
    col.wait_connected()

    good = feeds(feed_config(broker, tmp_path / "good", host="localhost",
                             tls={"ca_file": f"{d}/plant-ca.crt"}))
    wait_until(lambda: good.status()["connected"], what="TLS connection with the right CA")
    col.wait_for(lambda ms: any(json.loads(m.payload)["state"] == "online" for m in ms),
                 what="status over TLS")

    wrong_ca = feeds(feed_config(broker, tmp_path / "wrong", host="localhost",
                                 tls={"ca_file": f"{d}/other-ca.crt"}))
    st = wait_until(lambda: (s := wrong_ca.status())["broker"] == "tls_error" and s,
                    what="TLS refusal with the wrong CA")
    assert "certificate verify failed" in st["last_error"].lower() or \
        "unable to get local issuer" in st["last_error"].lower()
    assert "mqtt.tls.ca_file" in st["last_error"]

    # the certificate names localhost, not 127.0.0.1: the host name check must refuse it
    by_ip = feeds(feed_config(broker, tmp_path / "ip", host="127.0.0.1",
                              tls={"ca_file": f"{d}/plant-ca.crt"}))
    st = wait_until(lambda: (s := by_ip.status())["broker"] == "tls_error" and s,
                    what="host name mismatch refusal")
    assert "mismatch" in st["last_error"].lower() or "127.0.0.1" in st["last_error"]
    time.sleep(1.0)                      # several retries: still one error line per feed
    errors = [r for r in caplog.records if r.levelno == logging.ERROR and "TLS" in r.getMessage()]
    assert len(errors) == 2

    insecure = feeds(feed_config(broker, tmp_path / "insecure", host="127.0.0.1",
                                 tls={"ca_file": f"{d}/plant-ca.crt", "verify_hostname": False}))
    wait_until(lambda: insecure.status()["connected"], what="connection without host name check")
    assert any("verify_hostname is false" in r.getMessage() and r.levelno == logging.WARNING
               for r in caplog.records)


def test_passwords_from_file_and_env_and_wrong_password(broker_factory, feeds, tmp_path, caplog,
                                                        monkeypatch):
    caplog.set_level(logging.DEBUG, logger="straind.feed")
    pw = str(tmp_path / "passwd")
    subprocess.run(["mosquitto_passwd", "-c", "-b", pw, "station7", "s3cret-Pa55"], check=True,
                   capture_output=True)
    broker = broker_factory("auth-broker", password_file=pw)
    secret_file = tmp_path / "mqtt.pw"
    secret_file.write_text("s3cret-Pa55\n")
    secret_file.chmod(0o600)
    ok = feeds(feed_config(broker, tmp_path / "a", username="station7",
                           password_file=str(secret_file)))
    wait_until(lambda: ok.status()["connected"], what="login with the password file")

    monkeypatch.setenv("STRAIND_TEST_MQTT_PW", "wrong-guess-99")
    bad = feeds(feed_config(broker, tmp_path / "b", username="station7",
                            password_env="STRAIND_TEST_MQTT_PW"))
    st = wait_until(lambda: (s := bad.status())["broker"] == "refused" and s,
                    what="refusal of a wrong password")
    assert "not authorized" in st["last_error"].lower() or "password" in st["last_error"].lower()
    time.sleep(1.0)
    refusals = [r for r in caplog.records
                if r.levelno >= logging.WARNING and "refused the connection" in r.getMessage()]
    assert len(refusals) == 1 and "mqtt.username" in refusals[0].getMessage()

    # an inline password in a configuration file others can read is warned about
    conf = tmp_path / "straind.yaml"
    conf.write_text("mqtt: {}\n")
    conf.chmod(0o644)
    inline = feeds(feed_config(broker, tmp_path / "c", username="station7", password="s3cret-Pa55"),
                   config_path=str(conf))
    wait_until(lambda: inline.status()["connected"], what="login with the inline password")
    assert any("written inline" in r.getMessage() for r in caplog.records)
    text = "\n".join(r.getMessage() for r in caplog.records) + json.dumps(bad.status())
    assert "s3cret-Pa55" not in text and "wrong-guess-99" not in text

    monkeypatch.delenv("STRAIND_TEST_MQTT_PW")
    with pytest.raises(ConfigError, match="STRAIND_TEST_MQTT_PW"):
        Feed(feed_config(broker, tmp_path, username="u", password_env="STRAIND_TEST_MQTT_PW"),
             STATION, [], {}, health)


# ---------------------------------------------------------------------------------- commands

def test_commands_are_ignored_unless_enabled(mosquitto_broker, collector_factory, feeds, tmp_path,
                                             caplog):
    caplog.set_level(logging.INFO, logger="straind.feed")
    calls = []
    feed = feeds(feed_config(mosquitto_broker, tmp_path),
                 on_command=lambda *a: calls.append(a) or {})
    wait_until(lambda: feed.status()["connected"], what="feed connected")
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("cmd/reply")])
    col.wait_connected()
    time.sleep(0.2)
    for i in range(3):
        col.client.publish(base("cmd"), json.dumps({"command": "tare", "correlation_id": str(i)}),
                           qos=1)
    wait_until(lambda: feed.status()["commands"]["ignored"] == 3, what="commands counted")
    time.sleep(0.3)
    assert calls == [] and col.on(base("cmd/reply")) == []
    logged = [r for r in caplog.records if "remote commands are disabled" in r.getMessage()]
    assert len(logged) == 1


def test_commands_when_enabled_reply_with_correlation(mosquitto_broker, collector_factory, feeds,
                                                      tmp_path):
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    calls = []

    def on_command(name: str, args: dict, origin: str) -> dict:
        calls.append((name, args, origin))
        if name == "tare":
            return {"tared": args.get("channels", [])}
        raise CommandError(f"unknown command {name!r}")

    feed = feeds(feed_config(mosquitto_broker, tmp_path, commands={"enabled": True}),
                 on_command=on_command)
    wait_until(lambda: feed.status()["connected"], what="feed connected")
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port,
                            [base("cmd/reply"), "ops/replies/#"])
    col.wait_connected()
    time.sleep(0.2)
    pub = col.client.publish
    pub(base("cmd"), json.dumps({"command": "tare", "args": {"channels": ["sg1"]},
                                 "correlation_id": "c-1"}), qos=1)
    pub(base("cmd"), b"{not json", qos=1)
    pub(base("cmd"), json.dumps({"command": "explode", "correlation_id": "c-3"}), qos=1)
    pub(base("cmd"), json.dumps({"args": {}, "correlation_id": "c-4"}), qos=1)
    props = Properties(PacketTypes.PUBLISH)
    props.ResponseTopic = "ops/replies/console"
    props.CorrelationData = b"\x01\x02corr"
    pub(base("cmd"), json.dumps({"command": "tare", "args": {"channels": ["load"]}}), qos=1,
        properties=props)
    msgs = col.wait_for(lambda ms: len(ms) >= 5, what="five replies")
    replies = {json.loads(m.payload).get("correlation_id"): (m, json.loads(m.payload))
               for m in msgs if m.topic == base("cmd/reply")}
    assert replies["c-1"][1]["ok"] is True and replies["c-1"][1]["result"] == {"tared": ["sg1"]}
    assert replies["c-3"][1]["ok"] is False and "unknown command" in replies["c-3"][1]["error"]
    assert replies["c-4"][1]["ok"] is False and "command" in replies["c-4"][1]["error"]
    assert replies[None][1]["ok"] is False and "not JSON" in replies[None][1]["error"]
    v5 = [m for m in msgs if m.topic == "ops/replies/console"]
    assert len(v5) == 1 and json.loads(v5[0].payload)["result"] == {"tared": ["load"]}
    assert v5[0].properties.CorrelationData == b"\x01\x02corr"
    assert calls == [("tare", {"channels": ["sg1"]}, "mqtt"), ("explode", {}, "mqtt"),
                     ("tare", {"channels": ["load"]}, "mqtt")]
    assert feed.status()["connected"] and feed.status()["commands"]["failed"] == 3


def test_outbox_overflow_is_counted_and_announced(broker_factory, collector_factory, feeds,
                                                  tmp_path):
    broker = broker_factory("late-broker", start=False)
    layout = make_layout()
    feed = feeds(feed_config(broker, tmp_path, full_rate=True, outbox={"max_mb": 0.25}), [layout])
    rows = 1000
    for i in range(60):                 # about 1.6 MB of batches into a 0.25 MB outbox
        assert feed.submit(make_block(layout, i * rows, pattern(i * rows, rows)))
        if i % 10 == 9:
            time.sleep(0.05)
    wait_until(lambda: feed.status()["dropped"]["outbox_full"] > 0, what="outbox drops")
    broker.start()
    col = collector_factory(broker.host, broker.port, [base("#")])
    col.wait_connected()
    msgs = col.wait_for(lambda ms: any(m.topic == base("events") for m in ms), 15,
                        "the drop announcement")
    st = feed.status()
    dropped = st["dropped"]["outbox_full"]
    assert st["outbox"]["bytes"] <= 0.25 * (1 << 20)
    # announcements share the bounded outbox, so an early one may itself be dropped; each
    # carries the running total, and the last one accounts for every drop
    msgs = col.wait_for(lambda ms: any(m.topic == base("events") and json.loads(m.payload)
                                       ["detail"]["total_dropped"] == dropped for m in ms),
                        15, "the final drop announcement")
    events = [json.loads(m.payload) for m in msgs if m.topic == base("events")]
    assert all(e["kind"] == "feed_drop" and e["detail"]["reason"] == "outbox full" for e in events)
    totals = [e["detail"]["total_dropped"] for e in events]
    assert totals == sorted(totals) and totals[-1] == dropped
    assert sum(e["detail"]["dropped"] for e in events) <= dropped
    # what was kept is the newest data, in order and complete from its first message on
    wait_until(lambda: feed.status()["outbox"]["depth"] == 0, 15, "outbox drained")
    col.wait_for(lambda ms: sum(m.topic == base("full/bridge0") for m in ms) >= 60 - dropped,
                 what="kept batches")
    kept = [decode_batch(m.payload) for m in col.on(base("full/bridge0"))]
    assert [b.start_index for b in kept] == [i * rows for i in range(60 - len(kept), 60)]
    assert not any(math.isnan(x) for x in kept[-1].values[:, 0])


class SilentBroker:
    """Accepts MQTT 3.1.1 connections and answers CONNECT and PINGREQ, but never PUBACKs."""

    def __init__(self):
        import socket
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(4)
        self.host, self.port = "127.0.0.1", self.sock.getsockname()[1]
        self.publishes = 0
        self.conns = []
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            self.conns.append(conn)
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn) -> None:
        def read(n: int) -> bytes:
            buf = b""
            while len(buf) < n:
                chunk = conn.recv(n - len(buf))
                if not chunk:
                    raise OSError("closed")
                buf += chunk
            return buf
        try:
            while True:
                kind = read(1)[0] >> 4
                length, mult = 0, 1
                while True:                      # MQTT variable-length remaining length
                    byte = read(1)[0]
                    length += (byte & 0x7F) * mult
                    mult *= 128
                    if not byte & 0x80:
                        break
                read(length)
                if kind == 1:                    # CONNECT -> CONNACK accepted
                    conn.sendall(bytes([0x20, 2, 0, 0]))
                elif kind == 12:                 # PINGREQ -> PINGRESP
                    conn.sendall(bytes([0xD0, 0]))
                elif kind == 3:
                    self.publishes += 1          # PUBLISH: swallowed, never acknowledged
        except OSError:
            pass

    def close(self) -> None:
        self.sock.close()
        for c in self.conns:
            c.close()


def test_messages_stay_in_the_outbox_until_acknowledged(mosquitto_broker, collector_factory,
                                                        feeds, tmp_path):
    silent = SilentBroker()
    layout = make_layout()
    try:
        cfg = feed_config(mosquitto_broker, tmp_path, host=silent.host, port=silent.port,
                          protocol="3.1.1", full_rate=True)
        feed = feeds(cfg, [layout])
        wait_until(lambda: feed.status()["connected"], what="connected to the silent broker")
        for i in range(5):
            assert feed.submit(make_block(layout, i * 50, pattern(i * 50, 50)))
        wait_until(lambda: feed.status()["in_flight"] >= 5, what="batches sent")
        feed.stop(timeout_s=1.0)
        st = feed.status()
        assert st["delivered"] == 0 and st["outbox"]["depth"] >= 5 and silent.publishes >= 5
    finally:
        silent.close()
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("full/+")])
    col.wait_connected()
    again = feeds(feed_config(mosquitto_broker, tmp_path, protocol="3.1.1", full_rate=True),
                  [layout])
    col.wait_for(lambda ms: len(ms) >= 5, what="the unacknowledged batches")
    assert check_full_stream(col.on(base("full/bridge0")), 50) == [i * 50 for i in range(5)]
    wait_until(lambda: again.status()["outbox"]["depth"] == 0, what="outbox emptied")


def test_watch_tool_builds_its_table_from_the_feed(mosquitto_broker, feeds, tmp_path):
    layout = make_layout()
    feed = feeds(feed_config(mosquitto_broker, tmp_path, retain_values=True,
                             publish_interval_s=1.0), [layout])
    wait_until(lambda: feed.status()["connected"], what="feed connected")
    values = np.tile(np.array([[1.5, -2.25, 0.125]]), (1000, 1))
    values[-1] = [3.0, -4.0, 0.5]
    assert feed.submit(make_block(layout, 0, values, t0_ns=1_700_000_001_000_000_000))
    wait_until(lambda: feed.status()["delivered"] >= 3, what="value messages delivered")
    tool = os.path.join(os.path.dirname(__file__), "..", "tools", "watch_feed.py")
    out = subprocess.run([sys.executable, tool, "--host", mosquitto_broker.host, "--port",
                          str(mosquitto_broker.port), "--prefix", PREFIX, "--station", STATION,
                          "--once", "--timeout", "10"], capture_output=True, text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    rows = {line.split()[1]: line.split() for line in out.stdout.splitlines()
            if line.startswith("bridge0")}
    assert set(rows) == {"sg1", "sg2", "load"}
    # device channel unit mean min max last count quality
    assert rows["sg1"][2:9] == ["µε", f"{(999 * 1.5 + 3.0) / 1000:.6g}", "1.5", "3", "3", "1000",
                                "good"]
    assert rows["load"][2] == "kN" and rows["load"][6] == "0.5"
    assert f"station {STATION}" in out.stdout


# ------------------------------------------------------------------------ child process

def _child_main(argv: list[str]) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--child", action="store_true")
    ap.add_argument("--host")
    ap.add_argument("--port", type=int)
    ap.add_argument("--outbox")
    ap.add_argument("--start-index", type=int, default=0)
    ap.add_argument("--keepalive", type=int, default=5)
    ap.add_argument("--sync-interval", type=float, default=0.2)
    a = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, stream=sys.stderr)
    layout = make_layout()
    cfg = {"host": a.host, "port": a.port, "topic_prefix": PREFIX, "keepalive_s": a.keepalive,
           "reconnect_min_s": 0.2, "reconnect_max_s": 1.0, "full_rate": True,
           "publish_interval_s": 0.5, "outbox": {"path": a.outbox, "sync_interval_s": a.sync_interval}}
    feed = Feed(cfg, STATION, [layout], {"site": "child"}, health)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    feed.start()
    print("started", flush=True)
    rows, i = 50, 0
    while not stop.is_set():
        start = a.start_index + i * rows
        feed.submit(make_block(layout, start, pattern(start, rows)))
        i += 1
        stop.wait(0.05)
    feed.stop(timeout_s=8.0)
    topic = f"{PREFIX}/{STATION}/full/bridge0"
    print(json.dumps({"next_seq": feed._outbox.next_seq(topic),
                      "outbox_depth": feed.status()["outbox"]["depth"]}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(_child_main(sys.argv[1:]))
