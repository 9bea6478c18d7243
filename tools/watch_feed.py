#!/usr/bin/env python3
"""Live table of a station's channels from its MQTT feed.

Configures itself from the station's retained metadata (devices, channels, units), then shows
for every channel the latest interval summary (mean, min, max, last, count, quality) and, for
devices with a full-rate topic, the newest sample, the measured sample rate and any sequence
gaps in the batches.

    python tools/watch_feed.py --host broker --station rig7            # until Ctrl-C
    python tools/watch_feed.py --station rig7 --once                    # one table, then exit
    python tools/watch_feed.py --station rig7 --duration 30

Without --station the first station whose metadata arrives is shown. The subscription is a
clean, QoS 0 session: watching never makes the broker queue messages for this tool.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import threading
import time
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from straind.feed import decode_batch


class Watch:
    """State of one station, fed by MQTT messages (paho's thread), read by the printer."""

    def __init__(self, prefix: str, station: str | None):
        self.prefix = prefix.strip("/")
        self.station = station
        self.meta: dict | None = None
        self.status: dict | None = None
        self.values: dict[tuple[str, str], dict] = {}
        self.full: dict[str, dict] = {}
        self.events: list[dict] = []
        self.lock = threading.Lock()
        self.changed = threading.Condition(self.lock)

    def handle(self, topic: str, payload: bytes) -> None:
        parts = topic.split("/")
        n_prefix = len(self.prefix.split("/")) if self.prefix else 0
        if len(parts) < n_prefix + 2:
            return
        station, kind, rest = parts[n_prefix], parts[n_prefix + 1], parts[n_prefix + 2:]
        with self.lock:
            if self.station is None and kind == "meta":
                self.station = station
            if station != self.station:
                return
            try:
                if kind == "meta":
                    self.meta = json.loads(payload)
                elif kind == "status":
                    self.status = json.loads(payload)
                elif kind == "values" and len(rest) == 2:
                    self.values[(rest[0], rest[1])] = json.loads(payload)
                elif kind == "full" and len(rest) == 1:
                    self._full(rest[0], payload)
                elif kind == "events":
                    self.events = (self.events + [json.loads(payload)])[-5:]
            except ValueError as exc:
                print(f"undecodable message on {topic}: {exc}", file=sys.stderr)
                return
            self.changed.notify_all()

    def _full(self, device: str, payload: bytes) -> None:
        batch = decode_batch(payload)
        st = self.full.setdefault(device, {"gaps": 0, "samples": 0, "first_arrival": time.time(),
                                           "next_seq": None})
        if st["next_seq"] is not None and batch.seq > st["next_seq"]:
            st["gaps"] += batch.seq - st["next_seq"]
        if st["next_seq"] is None or batch.seq >= st["next_seq"]:
            st["next_seq"] = batch.seq + 1
        st["samples"] += batch.n_samples
        st["last"] = batch.values[-1].tolist() if batch.n_samples else []
        st["last_time_ns"] = int(batch.times_ns()[-1]) if batch.n_samples else None
        st["seq"] = batch.seq
        st["arrival"] = time.time()

    def complete(self) -> bool:
        """Metadata known and a value (or a batch) seen for every channel."""
        if self.meta is None:
            return False
        for dev in self.meta.get("devices", []):
            if dev.get("full_rate") and dev["name"] in self.full:
                continue
            if not all((dev["name"], ch["name"]) in self.values for ch in dev["channels"]):
                return False
        return True

    def table(self) -> str:
        with self.lock:
            return self._table()

    def _table(self) -> str:
        lines = []
        st = self.status or {}
        feed = (st.get("health") or {}).get("feed") or {}
        lines.append(f"station {self.station or '?'}  state {st.get('state', '?')}"
                     f" ({st.get('reason', '')})  broker {feed.get('broker', '?')}"
                     f"  outbox {(feed.get('outbox') or {}).get('depth', '?')}")
        if self.meta is None:
            lines.append("(waiting for the retained metadata)")
            return "\n".join(lines)
        head = (f"{'device':10} {'channel':12} {'unit':6} {'mean':>12} {'min':>12} {'max':>12} "
                f"{'last':>12} {'count':>6} {'quality':9} {'full-rate last':>14}")
        lines += [head, "-" * len(head)]
        for dev in self.meta.get("devices", []):
            full = self.full.get(dev["name"])
            for ch in dev["channels"]:
                v = self.values.get((dev["name"], ch["name"]), {})
                col = ch.get("column", 0)
                fr = ""
                if full and full.get("last") and col < len(full["last"]):
                    fr = _num(full["last"][col])
                lines.append(f"{dev['name']:10.10} {ch['name']:12.12} {ch.get('unit', ''):6.6} "
                             f"{_num(v.get('mean')):>12} {_num(v.get('min')):>12} "
                             f"{_num(v.get('max')):>12} {_num(v.get('last')):>12} "
                             f"{v.get('count', ''):>6} {v.get('quality', ''):9} {fr:>14}")
            if full:
                span = max(full["arrival"] - full["first_arrival"], 1e-9)
                lines.append(f"{'':10} full rate: seq {full['seq']}, {full['samples']} samples "
                             f"(~{full['samples'] / span:,.0f} S/s), gaps {full['gaps']}")
        for ev in self.events[-3:]:
            lines.append(f"event {ev.get('time', '')} {ev.get('kind')} {ev.get('device', '')}"
                         f"{'/' + ev['channel'] if ev.get('channel') else ''} "
                         f"{json.dumps(ev.get('detail', {}))[:60]}")
        return "\n".join(lines)


def _num(x: Any) -> str:
    if x is None or x == "":
        return ""
    try:
        return f"{float(x):.6g}"
    except (TypeError, ValueError):
        return str(x)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--host", default="localhost")
    ap.add_argument("--port", type=int, default=1883)
    ap.add_argument("--prefix", default="straind", help="topic prefix (mqtt.topic_prefix)")
    ap.add_argument("--station", help="station id (default: the first one seen)")
    ap.add_argument("--once", action="store_true",
                    help="print one table once every channel has a value, then exit")
    ap.add_argument("--duration", type=float, help="run this many seconds, then exit")
    ap.add_argument("--timeout", type=float, default=15.0, help="--once: give up after (s)")
    ap.add_argument("--interval", type=float, default=1.0, help="refresh period (s)")
    ap.add_argument("--tls-ca", help="CA file: connect with TLS")
    ap.add_argument("--username")
    ap.add_argument("--password-env", help="environment variable holding the password")
    a = ap.parse_args(argv)

    watch = Watch(a.prefix, a.station)
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv5)
    if a.tls_ca:
        client.tls_set(ca_certs=a.tls_ca)
    if a.username:
        client.username_pw_set(a.username, os.environ.get(a.password_env or "", None))
    base = f"{a.prefix.strip('/')}/{a.station or '+'}"
    problems: list[str] = []

    def on_connect(c, u, flags, rc, props):
        if rc.is_failure:
            problems.append(str(rc))
            return
        for sub in ("meta", "status", "events", "values/+/+", "full/+"):
            c.subscribe(f"{base}/{sub}", qos=0)

    client.on_connect = on_connect
    client.on_message = lambda c, u, m: watch.handle(m.topic, bytes(m.payload))
    try:
        client.connect(a.host, a.port, 30)
    except OSError as exc:
        print(f"cannot reach the broker at {a.host}:{a.port}: {exc}", file=sys.stderr)
        return 2
    client.loop_start()
    try:
        if a.once:
            deadline = time.monotonic() + a.timeout
            with watch.lock:
                while not watch.complete() and time.monotonic() < deadline and not problems:
                    watch.changed.wait(0.2)
                done = watch.complete()
            print(watch.table())
            if problems:
                print(f"broker refused the connection: {problems[0]}", file=sys.stderr)
            return 0 if done else 1
        end = time.monotonic() + a.duration if a.duration else None
        tty = sys.stdout.isatty()
        while end is None or time.monotonic() < end:
            time.sleep(a.interval)
            text = watch.table()
            print(("\x1b[H\x1b[2J" if tty else "") + text + ("" if tty else "\n"), flush=True)
        return 0
    except KeyboardInterrupt:
        return 0
    finally:
        client.disconnect()
        client.loop_stop()


if __name__ == "__main__":
    sys.exit(main())
