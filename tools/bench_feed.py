#!/usr/bin/env python3
"""Benchmark of the MQTT feed: delivery rate, loss and latency to a subscriber in another process.

Starts its own Mosquitto on a free loopback port (with the per-client queue raised, as for a
lossless subscriber) and a subscriber process, then runs, in one go:

  outbox    raw outbox speed (append + read + ack of full-rate sized records) beside a sqlite3
            table with batched commits doing the same, to justify the segment log
  rt-feed   real time: N channels x R S/s through `Feed` (QoS 1, full-rate batches of one block,
            plus the per-channel value messages), blocks submitted when their last sample is due;
            latency = arrival - time of the newest (and of the oldest) sample in the batch
  rt-paho   the same payloads at the same pace published by a bare paho client (QoS 1)
  warm-up   a throwaway flat-out burst by a bare paho client (the first burst after start-up
            runs slow whoever sends it; not reported)
  max-feed  as fast as possible through `Feed` (backpressure on its queue; summary interval
            of an hour, so only the batch path is measured), all through one outbox
            directory: max-feed-cold starts with none, the later bursts find the segment files
            emptied before and write over them, as a service that has been running does
  max-paho  the same payloads as fast as possible by a bare paho client with the same
            in-flight window
            max-feed and max-paho run in turn --repeats times (max-feed-1, max-paho-1, ...);
            the feed/paho delivered-rate ratio printed is the median of the pairs' ratios (one
            flat-out burst lasts about a second, and a shared machine's hiccups move single
            ones by 20 % and more)

    python tools/bench_feed.py [--channels 32] [--rate 10000] [--block 1000] [--duration 10]
                               [--max-blocks 2000] [--repeats 3] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_broker(workdir: str) -> tuple[subprocess.Popen, int]:
    binary = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    if not os.path.exists(binary):
        sys.exit("mosquitto is not installed: apt-get install mosquitto")
    port = free_port()
    conf = os.path.join(workdir, "mosquitto.conf")
    lines = [f"listener {port} 127.0.0.1", "allow_anonymous true",
             "max_queued_messages 1000000", "max_queued_bytes 0",
             "max_inflight_messages 100", "set_tcp_nodelay true",
             f"log_dest file {workdir}/mosquitto.log"]
    if os.geteuid() == 0:
        lines.append("user root")
    with open(conf, "w") as fh:
        fh.write("\n".join(lines) + "\n")
    proc = subprocess.Popen([binary, "-c", conf], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    for _ in range(200):
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return proc, port
        except OSError:
            time.sleep(0.05)
    proc.kill()
    sys.exit("mosquitto did not start")


# ------------------------------------------------------------------------------- subscriber

def subscriber_main(port: int) -> int:
    """Another process: count, de-duplicate and time every full-rate message per phase."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    from straind.feed import BATCH_HEADER

    phases: dict[str, dict] = {}
    lock = threading.Condition()
    ready = threading.Event()

    def on_connect(c, u, flags, rc, props):
        c.subscribe("bench/#", qos=1)

    def on_subscribe(c, u, mid, rcs, props):
        ready.set()

    def on_message(c, u, msg):
        now = time.time_ns()
        parts = msg.topic.split("/")
        if parts[1] == "ctl":
            with lock:
                ph = phases.setdefault(parts[3], _new_phase())
                count, start_ns = msg.payload.split()
                ph["expected"], ph["start_ns"] = int(count), int(start_ns)
                lock.notify_all()
            return
        if "full" not in parts:
            if "values" in parts:
                with lock:
                    phases.setdefault(parts[1], _new_phase())["values_msgs"] += 1
            return
        (_, _, _, _, seq, first_ns, period_ns, _, n, k, _, _) = BATCH_HEADER.unpack_from(msg.payload)
        with lock:
            ph = phases.setdefault(parts[1], _new_phase())
            if seq in ph["seen"]:
                ph["dups"] += 1
                return
            ph["seen"].add(seq)
            ph["arrivals"].append(now)
            ph["lat_newest"].append(now - (first_ns + (n - 1) * period_ns))
            ph["lat_oldest"].append(now - first_ns)
            ph["rows"] += n
            ph["values"] += n * k
            ph["bytes"] += len(msg.payload)
            lock.notify_all()

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-sub-{os.getpid()}",
                         protocol=mqtt.MQTTv5)
    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    client.connect("127.0.0.1", port, 30)
    client.loop_start()
    ready.wait(10)
    print("ready", flush=True)
    for line in sys.stdin:
        name = line.strip()
        if not name:
            continue
        if name == "quit":
            break
        deadline = time.monotonic() + 60
        with lock:
            while True:
                ph = phases.setdefault(name, _new_phase())
                if ph["expected"] is not None and len(ph["seen"]) >= ph["expected"]:
                    break
                if time.monotonic() > deadline:
                    break
                lock.wait(0.2)
            print(json.dumps(_summary(name, ph)), flush=True)
    client.disconnect()
    client.loop_stop()
    return 0


def _new_phase() -> dict:
    return {"expected": None, "start_ns": None, "seen": set(), "arrivals": [], "lat_newest": [],
            "lat_oldest": [], "rows": 0, "values": 0, "bytes": 0, "dups": 0, "values_msgs": 0}


def _summary(name: str, ph: dict) -> dict:
    seen = ph["seen"]
    n = len(seen)
    expected = ph["expected"] if ph["expected"] is not None else n
    arr = np.array(ph["arrivals"], dtype=np.int64)
    # delivered rate: messages over the time from the first send to the last arrival (an
    # arrival-to-arrival span would flatter a sender that buffers before it starts sending)
    start = ph["start_ns"] if ph["start_ns"] is not None else (arr.min() if n else 0)
    span = (arr.max() - start) / 1e9 if n > 1 else float("nan")
    out = {"phase": name, "expected": expected, "received": n,
           "lost": expected - len([s for s in seen if s < expected]),
           "duplicates": ph["dups"], "value_messages": ph["values_msgs"],
           "msgs_per_s": n / span if n > 1 else None,
           "rows_per_s": ph["rows"] / span if n > 1 else None,
           "values_per_s": ph["values"] / span if n > 1 else None,
           "mb_per_s": ph["bytes"] / span / 1e6 if n > 1 else None,
           "first_arrival_after_ms": (arr.min() - start) / 1e6 if n else None}
    for key in ("lat_newest", "lat_oldest"):
        if ph[key]:
            lat = np.array(ph[key], dtype=np.float64) / 1e6
            out[f"{key}_p50_ms"] = float(np.percentile(lat, 50))
            out[f"{key}_p99_ms"] = float(np.percentile(lat, 99))
    return out


# --------------------------------------------------------------------------------- outbox

def bench_outbox(workdir: str, payload_bytes: int, n: int) -> dict:
    from straind.outbox import Outbox

    payload = os.urandom(payload_bytes)
    ob = Outbox(os.path.join(workdir, "ob-bench"), max_bytes=1 << 34, sync_interval_s=0.5)
    t0 = time.perf_counter()
    for i in range(n):
        ob.append("bench/x/full/d", payload)
        if i % 10 == 9:
            ob.flush()
            ob.maybe_sync()
    ob.flush()
    t1 = time.perf_counter()
    while True:
        r = ob.next_unsent()
        if r is None:
            break
        ob.ack(r.rec)
    ob.sync()
    t2 = time.perf_counter()
    ob.close()

    db = sqlite3.connect(os.path.join(workdir, "ob-bench.sqlite"), isolation_level=None)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("PRAGMA synchronous=NORMAL")
    db.execute("CREATE TABLE m (rec INTEGER PRIMARY KEY, topic TEXT, payload BLOB)")
    s0 = time.perf_counter()
    db.execute("BEGIN")
    for i in range(n):
        db.execute("INSERT INTO m (topic, payload) VALUES (?, ?)", ("bench/x/full/d", payload))
        if i % 10 == 9:
            db.execute("COMMIT")
            db.execute("BEGIN")
    db.execute("COMMIT")
    s1 = time.perf_counter()
    for rec, _t, _p in db.execute("SELECT rec, topic, payload FROM m ORDER BY rec").fetchall():
        pass
    db.execute("DELETE FROM m")
    s2 = time.perf_counter()
    db.close()
    mb = n * payload_bytes / 1e6
    return {"phase": "outbox", "records": n, "record_bytes": payload_bytes,
            "segment_log_append_mb_per_s": mb / (t1 - t0),
            "segment_log_read_ack_mb_per_s": mb / (t2 - t1),
            "sqlite_append_mb_per_s": mb / (s1 - s0),
            "sqlite_read_delete_mb_per_s": mb / (s2 - s1)}


# ------------------------------------------------------------------------------ publishers

def make_layout(channels: int, rate_hz: float):
    from straind.layout import ChannelLayout, DeviceLayout
    chans = tuple(ChannelLayout(f"ch{j:02d}", j, "strain", "µε") for j in range(channels))
    return DeviceLayout("dev0", "simulated-bridge", rate_hz, "int32", channels, chans)


_RAW_CODES: dict[tuple, np.ndarray] = {}


def make_block(layout, start_index: int, t0_ns: int, values: np.ndarray, quality: np.ndarray):
    """A block as the chain hands it to the feed. The feed reads only the values, so every
    block shares one array of raw codes (the producer's own cost stays out of the figures)."""
    from straind.block import Block, EngineeringBlock
    codes = _RAW_CODES.get(values.shape)
    if codes is None:
        codes = _RAW_CODES[values.shape] = np.zeros(values.shape, np.int32)
    raw = Block(layout.name, codes, quality, start_index, layout.period_ns,
                start_index // values.shape[0], time.monotonic_ns(), time.time_ns(), t0_ns)
    return EngineeringBlock(raw, values, quality, layout.names, layout.units)


def new_feed(port: int, prefix: str, layout, workdir: str, interval_s: float = 1.0,
             outbox_name: str | None = None):
    from straind.feed import Feed
    cfg = {"host": "127.0.0.1", "port": port, "topic_prefix": "bench", "full_rate": True,
           "qos": 1, "publish_interval_s": interval_s, "batch_samples": 0, "max_inflight": 64,
           "queue_blocks": 1000, "client_id": f"bench-{prefix}",
           "outbox": {"path": os.path.join(workdir, f"outbox-{outbox_name or prefix}"),
                      "max_mb": 4096}}
    feed = Feed(cfg, prefix, [layout], {"bench": True}, lambda: {})
    feed.start()
    deadline = time.monotonic() + 10
    while not feed.status()["connected"]:
        if time.monotonic() > deadline:
            sys.exit("feed did not connect")
        time.sleep(0.02)
    return feed


class PahoPublisher:
    """A bare paho client with an in-flight window, for the reference figures."""

    def __init__(self, port: int, window: int):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-paho-{os.getpid()}",
                                  protocol=mqtt.MQTTv5)
        self.client.max_inflight_messages_set(window)
        self.window = window
        self.outstanding = 0
        self.cond = threading.Condition()
        self.client.on_publish = self._on_publish
        self.client.connect("127.0.0.1", port, 30)
        self.client.loop_start()

    def _on_publish(self, c, u, mid, rc, props):
        with self.cond:
            self.outstanding -= 1
            self.cond.notify_all()

    def publish(self, topic: str, payload: bytes) -> None:
        with self.cond:
            while self.outstanding >= self.window:
                self.cond.wait(0.5)
            self.outstanding += 1
        self.client.publish(topic, payload, qos=1)

    def drain(self) -> None:
        with self.cond:
            while self.outstanding > 0:
                self.cond.wait(0.5)

    def close(self) -> None:
        self.drain()
        self.client.disconnect()
        self.client.loop_stop()


def payloads(layout, block: int, count: int, start_t0_ns: int, values, quality, pace: bool):
    """(t0_ns, start_index) for each block; paced to real time when asked."""
    period = layout.period_ns
    for i in range(count):
        t0 = start_t0_ns + i * block * period
        if pace:
            due = t0 + block * period          # the block is complete after its last sample
            delay = (due - time.time_ns()) / 1e9
            if delay > 0:
                time.sleep(delay)
        yield i, t0, i * block


def run_feed_phase(name, port, layout, block, count, values, quality, pace, workdir, ctl,
                   outbox_name=None):
    # flat out, the sample clock runs far faster than real time: an hour-long summary interval
    # keeps the value messages out, so the batch path alone is compared with plain paho
    feed = new_feed(port, name, layout, workdir, 1.0 if pace else 3600.0, outbox_name)
    start = time.time_ns()
    for i, t0, idx in payloads(layout, block, count, start, values, quality, pace):
        while len(feed._queue) > 800:             # backpressure for the flat-out phase
            time.sleep(0.001)
        if not feed.submit(make_block(layout, idx, t0, values, quality)):
            print(f"{name}: block {i} refused", file=sys.stderr)
    feed.stop(timeout_s=60)
    st = feed.status()
    ctl.publish(f"bench/ctl/end/{name}", f"{count} {start}", qos=1).wait_for_publish(10)
    return {"outbox_left": st["outbox"]["depth"], "dropped": st["dropped"]}


def run_paho_phase(name, port, layout, block, count, values, quality, pace, ctl):
    from straind.feed import encode_batch
    pub = PahoPublisher(port, 64)
    start = time.time_ns()
    topic = f"bench/{name}/full/dev0"
    for i, t0, idx in payloads(layout, block, count, start, values, quality, pace):
        pub.publish(topic, encode_batch(i, t0, layout.period_ns, idx, values, quality, "float32",
                                        0))
    pub.close()
    ctl.publish(f"bench/ctl/end/{name}", f"{count} {start}", qos=1).wait_for_publish(10)
    return {}


def main(argv: list[str] | None = None) -> int:
    from straind.memory import add_allocator_argument, apply_allocator_argument
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--channels", type=int, default=32)
    ap.add_argument("--rate", type=float, default=10_000.0, help="samples per second per channel")
    ap.add_argument("--block", type=int, default=1000, help="samples per block (one batch)")
    ap.add_argument("--duration", type=float, default=10.0, help="real-time phases, seconds")
    ap.add_argument("--max-blocks", type=int, default=2000, help="blocks in the flat-out phases")
    ap.add_argument("--repeats", type=int, default=3,
                    help="flat-out feed/paho pairs; the ratio is their median")
    ap.add_argument("--json", action="store_true", help="print the results as JSON")
    ap.add_argument("--subscriber", type=int, help=argparse.SUPPRESS)
    add_allocator_argument(ap)
    a = ap.parse_args(argv)
    apply_allocator_argument(a)
    if a.subscriber:
        return subscriber_main(a.subscriber)

    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    workdir = tempfile.mkdtemp(prefix="straind-bench-")
    broker, port = start_broker(workdir)
    sub = subprocess.Popen([sys.executable, os.path.abspath(__file__), "--subscriber", str(port)],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    results = []
    try:
        if sub.stdout.readline().strip() != "ready":
            sys.exit("subscriber did not start")
        ctl = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-ctl", protocol=mqtt.MQTTv5)
        ctl.connect("127.0.0.1", port, 30)
        ctl.loop_start()
        layout = make_layout(a.channels, a.rate)
        rng = np.random.default_rng(1)
        values = rng.normal(0.0, 100.0, size=(a.block, a.channels))
        quality = np.zeros((a.block, a.channels), np.uint8)
        payload_bytes = a.block * a.channels * 5 + 52
        results.append(bench_outbox(workdir, payload_bytes, 500))
        rt_blocks = max(2, int(a.duration * a.rate / a.block))

        def collect(name: str, extra: dict) -> None:
            sub.stdin.write(name + "\n")
            sub.stdin.flush()
            res = json.loads(sub.stdout.readline())
            res.update(extra)
            results.append(res)

        collect("rt-feed", run_feed_phase("rt-feed", port, layout, a.block, rt_blocks, values,
                                          quality, True, workdir, ctl))
        collect("rt-paho", run_paho_phase("rt-paho", port, layout, a.block, rt_blocks, values,
                                          quality, True, ctl))
        # the first flat-out burst after start-up runs at about half speed whoever sends it
        # (the broker and the subscriber grow their buffers): a throwaway burst goes first
        collect("warm-up", run_paho_phase("warm-up", port, layout, a.block,
                                          max(20, a.max_blocks // 4), values, quality, False,
                                          ctl))
        # a fresh outbox grows new files; a running one writes over the segment files it
        # emptied (daemon/outbox.py), which on some machines is several times cheaper: the
        # cold burst is reported, the ratio is taken on the later bursts through the same
        # outbox directory, as a service that has been running has it
        collect("max-feed-cold", run_feed_phase("max-feed-cold", port, layout, a.block,
                                                a.max_blocks, values, quality, False, workdir,
                                                ctl, "max"))
        for r in range(1, a.repeats + 1):
            collect(f"max-feed-{r}", run_feed_phase(f"max-feed-{r}", port, layout, a.block,
                                                    a.max_blocks, values, quality, False,
                                                    workdir, ctl, "max"))
            collect(f"max-paho-{r}", run_paho_phase(f"max-paho-{r}", port, layout, a.block,
                                                    a.max_blocks, values, quality, False, ctl))
        sub.stdin.write("quit\n")
        sub.stdin.flush()
        ctl.disconnect()
        ctl.loop_stop()
    finally:
        sub.wait(10) if sub.poll() is None else None
        broker.send_signal(signal.SIGTERM)
        broker.wait(10)
        shutil.rmtree(workdir, ignore_errors=True)

    by = {r["phase"]: r for r in results}
    pairs = [by[f"max-feed-{r}"]["msgs_per_s"] / by[f"max-paho-{r}"]["msgs_per_s"]
             for r in range(1, a.repeats + 1)]
    ratio = float(np.median(pairs))
    cold_ratio = by["max-feed-cold"]["msgs_per_s"] / by["max-paho-1"]["msgs_per_s"]
    if a.json:
        print(json.dumps({"results": results, "feed_over_paho": ratio,
                          "feed_over_paho_each": pairs, "cold_feed_over_paho": cold_ratio},
                         indent=2))
        return 0
    ob = by["outbox"]
    print(f"outbox ({ob['records']} records of {ob['record_bytes']} B): segment log append "
          f"{ob['segment_log_append_mb_per_s']:.0f} MB/s, read+ack "
          f"{ob['segment_log_read_ack_mb_per_s']:.0f} MB/s; sqlite3 (WAL, commit per 10) append "
          f"{ob['sqlite_append_mb_per_s']:.0f} MB/s, read+delete "
          f"{ob['sqlite_read_delete_mb_per_s']:.0f} MB/s")
    print(f"load: {a.channels} ch x {a.rate:g} S/s = {a.channels * a.rate:,.0f} values/s, "
          f"batches of {a.block} samples ({payload_bytes / 1e3:.0f} kB), QoS 1")
    print(f"{'phase':13} {'expect':>7} {'recv':>7} {'lost':>5} {'dup':>4} {'msg/s':>8} "
          f"{'values/s':>12} {'MB/s':>6} {'p50 new':>8} {'p99 new':>8} {'p50 old':>8} "
          f"{'p99 old':>8}")
    flat = [n for r in range(1, a.repeats + 1) for n in (f"max-feed-{r}", f"max-paho-{r}")]
    for name in ("rt-feed", "rt-paho", "max-feed-cold", *flat):
        r = by[name]
        lat = [r.get(k) for k in ("lat_newest_p50_ms", "lat_newest_p99_ms", "lat_oldest_p50_ms",
                                  "lat_oldest_p99_ms")]
        lat_s = " ".join(f"{x:8.1f}" for x in lat) if name.startswith("rt") else \
            " ".join(f"{'-':>8}" for _ in lat)
        print(f"{name:13} {r['expected']:7d} {r['received']:7d} {r['lost']:5d} "
              f"{r['duplicates']:4d} {r['msgs_per_s'] or 0:8.1f} {r['values_per_s'] or 0:12,.0f} "
              f"{r['mb_per_s'] or 0:6.1f} {lat_s}")
    print("latency in ms from the newest / oldest sample of each batch to its arrival")
    print(f"flat-out delivered rate, feed / plain paho: {ratio:.2f}, the median of "
          f"{', '.join(f'{x:.2f}' for x in pairs)} (fresh outbox, against max-paho-1: "
          f"{cold_ratio:.2f})")
    rt = by["rt-feed"]
    ok = rt["lost"] == 0 and rt["lat_oldest_p99_ms"] < 250 and ratio >= 0.5 and \
        all(by[n]["lost"] == 0 for n in flat + ["max-feed-cold"])
    print("targets (none lost, p99 < 250 ms from the oldest sample, ratio >= 0.5): "
          + ("met" if ok else "NOT met"))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
