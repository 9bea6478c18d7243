"""The MQTT feed and its outbox with a full or read-only disk: the feed keeps publishing from
memory, the outbox log stays whole, and the outbox is used again once the disk takes data.

The full disk is a real, small tmpfs mounted for the test (the tests run as root); the
read-only case and the write faults that a tmpfs cannot produce on demand (a short write, a
file that cannot be cut back) are injected at the outbox's write path.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import subprocess

import numpy as np
import pytest

from straind.feed import Feed
from straind.outbox import Outbox
from test_feed import (STATION, base, feed_config, health, make_block, make_layout,
                       unique_in_order, wait_until)

ROWS = 500            # samples per block: half a second at 1 kHz, one publish interval


@contextlib.contextmanager
def small_disk(path, size: str = "256k"):
    """A tmpfs of `size` mounted at `path` for the duration of the block."""
    path = str(path)
    os.makedirs(path, exist_ok=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", path], check=True,
                   capture_output=True)
    try:
        yield path
    finally:
        if subprocess.run(["umount", path], capture_output=True).returncode != 0:
            subprocess.run(["umount", "-l", path], check=True, capture_output=True)


def fill(path: str) -> None:
    """Write `path` until the file system is full (ENOSPC)."""
    with open(path, "wb", buffering=0) as fh:
        chunk = b"\xa5" * 4096
        with pytest.raises(OSError) as info:
            while True:
                fh.write(chunk)
    assert info.value.errno == errno.ENOSPC


def segment_bytes(path: str) -> int:
    return sum(os.path.getsize(os.path.join(path, n)) for n in os.listdir(path)
               if n.endswith(".seg"))


def read_all(ob: Outbox) -> list:
    out = []
    while (rec := ob.next_unsent()) is not None:
        out.append(rec)
    return out


# ------------------------------------------------------------------------ the outbox alone

def test_append_on_a_full_disk_keeps_the_log_whole_and_works_again(tmp_path, monkeypatch):
    cuts = []
    real_cut = Outbox._cut_partial
    monkeypatch.setattr(Outbox, "_cut_partial",
                        lambda self, seg, written: (cuts.append(seg.size),
                                                    real_cut(self, seg, written)))
    with small_disk(tmp_path / "disk") as disk:
        path = os.path.join(disk, "outbox")
        ob = Outbox(path, max_bytes=64 << 20, sync_interval_s=0.0)
        stored = []
        for i in range(3):
            payload = bytes([i % 251]) * 1000
            stored.append((*ob.append("t/a", payload), payload))
        filler = os.path.join(disk, "filler")
        fill(filler)
        # 1043-byte records: the 4th crosses the end of the first 4 KiB page, the only one the
        # full tmpfs gave the segment, so the kernel takes part of it and then says ENOSPC
        with pytest.raises(OSError) as info:
            for i in range(3, 10_000):
                payload = bytes([i % 251]) * 1000
                rec, seq = ob.append("t/a", payload)
                stored.append((rec, seq, payload))
        assert info.value.errno == errno.ENOSPC
        n = len(stored)
        assert n == 3 and cuts == [3 * 1043]        # written in part, cut back to the 3rd
        # nothing moved: no record number, no sequence number, no bytes beyond the good records
        assert ob.next_record == n and ob.next_seq("t/a") == n and ob.depth == n
        assert segment_bytes(path) == ob.bytes
        assert ob.stats()["bytes"] == ob.bytes
        ob.sync()                                # the state write fails quietly, is kept
        assert ob.stats()["state_write_error"] is not None
        os.remove(filler)
        for i in range(n, n + 5):
            payload = bytes([i % 251]) * 1000
            stored.append((*ob.append("t/a", payload), payload))
        ob.sync()
        assert ob.stats()["state_write_error"] is None
        got = read_all(ob)
        assert [(r.rec, r.seq, r.payload) for r in got] == stored
        assert [s for _, s, _ in stored] == list(range(n + 5))
        ob.close()
        again = Outbox(path, max_bytes=64 << 20)
        assert again.corrupt == 0 and again.depth == n + 5 and again.next_seq("t/a") == n + 5
        assert [(r.rec, r.seq, r.payload) for r in read_all(again)] == stored
        again.close()


class _ShortThenFull:
    """os.writev whose next call stores only part of the record, then says ENOSPC."""

    def __init__(self, part: int):
        self.part, self.calls = part, 0

    def __call__(self, fd: int, parts) -> int:
        self.calls += 1
        if self.calls == 1:
            return os.write(fd, b"".join(bytes(p) for p in parts)[:self.part])
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


@pytest.mark.parametrize("cut_fails", [False, True])
def test_a_short_write_is_cut_back_or_skipped(tmp_path, monkeypatch, cut_fails):
    path = str(tmp_path / "outbox")
    ob = Outbox(path, max_bytes=64 << 20)
    first = [ob.append("t/b", f"m{i}".encode() * 20) for i in range(3)]
    monkeypatch.setattr(os, "writev", _ShortThenFull(25))
    if cut_fails:
        def no_truncate(fd, length):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS))
        monkeypatch.setattr(os, "ftruncate", no_truncate)
    with pytest.raises(OSError):
        ob.append("t/b", b"lost" * 30)
    monkeypatch.undo()
    # the log in the running process: either cut back, or the torn bytes are a skipped range
    assert segment_bytes(path) == ob.bytes == (sum(40 + 3 + 40 for _ in first) + (25 if cut_fails else 0))
    later = [ob.append("t/b", f"n{i}".encode() * 20) for i in range(2)]
    got = read_all(ob)
    assert [r.seq for r in got] == [0, 1, 2, 3, 4]          # the failed append used no number
    assert [r.rec for r in got] == [rec for rec, _ in first + later]
    ob.close()
    again = Outbox(path, max_bytes=64 << 20)
    assert again.corrupt == (1 if cut_fails else 0)
    assert [r.payload for r in read_all(again)] == [f"m{i}".encode() * 20 for i in range(3)] + \
        [f"n{i}".encode() * 20 for i in range(2)]
    again.close()


# --------------------------------------------------------------------- the feed, real broker

def _values(col, channel: str) -> list[dict]:
    msgs = col.on(base(f"values/bridge0/{channel}"))
    order, seen = unique_in_order(msgs)
    return [json.loads(seen[s]) for s in order]


def _events(col) -> list[dict]:
    return [json.loads(m.payload) for m in col.on(base("events"))]


def test_feed_publishes_through_a_full_disk_and_uses_the_outbox_again(
        mosquitto_broker, collector_factory, tmp_path):
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("#")],
                            client_id="historian-diskfull")
    col.wait_connected()
    layout = make_layout()
    seen_events = []
    rng = np.random.default_rng(7)
    n_blocks = 0

    def produce(k: int) -> None:
        nonlocal n_blocks
        for _ in range(k):
            values = rng.normal(100.0, 5.0, (ROWS, 3))
            assert feed.submit(make_block(layout, n_blocks * ROWS, values))
            n_blocks += 1

    with small_disk(tmp_path / "disk") as disk:
        outbox = os.path.join(disk, "outbox")
        cfg = feed_config(mosquitto_broker, tmp_path,
                          outbox={"path": outbox, "max_mb": 16, "sync_interval_s": 0.2})
        feed = Feed(cfg, STATION, [layout], {"site": "hall 2"}, health,
                    on_event=seen_events.append)
        feed.outbox_retry_s = 0.3
        try:
            feed.start()
            wait_until(lambda: feed.status()["connected"], what="feed connected")
            produce(6)
            wait_until(lambda: len(_values(col, "sg1")) >= 5, what="values before the fault")
            assert feed.status()["outbox"]["state"] == "ok"

            fill(os.path.join(disk, "filler"))
            produce(40)                                   # ~40 x 3 value messages, >100 kB
            st = wait_until(lambda: (s := feed.status())["outbox"]["state"] == "unwritable"
                            and s, what="outbox reported unwritable")
            assert "No space left" in st["outbox"]["error"]
            records_at_fault = feed._outbox.next_record
            # values keep arriving while the disk stays full
            wait_until(lambda: len(_values(col, "sg1")) >= 45, what="values while disk full")
            assert feed.status()["outbox"]["state"] == "unwritable"
            assert feed._outbox.next_record == records_at_fault
            assert any(e["kind"] == "outbox_unwritable" for e in _events(col))
            assert [e.kind for e in seen_events].count("outbox_unwritable") == 1

            # a broker outage while the disk is full: messages wait in memory, in order
            mosquitto_broker.stop()
            produce(10)
            wait_until(lambda: feed.status()["outbox"]["memory"]["unsent"] >= 25,
                       what="messages waiting in memory")
            mosquitto_broker.start()
            wait_until(lambda: len(_values(col, "sg1")) >= 55, 20, "memory drained to broker")

            os.remove(os.path.join(disk, "filler"))        # space returns
            wait_until(lambda: feed.status()["outbox"]["state"] == "ok", what="recovery")
            produce(8)
            wait_until(lambda: feed._outbox.next_record >= records_at_fault + 3 * 7,
                       what="outbox used again")
        finally:
            feed.stop(timeout_s=3.0)
        wait_until(lambda: all(len(_values(col, ch)) >= n_blocks for ch in ("sg1", "sg2", "load")),
                   20, "every value message")
        st = feed.status()
        left = Outbox(outbox, max_bytes=16 << 20)
        try:
            assert left.corrupt == 0 and left.depth == 0
        finally:
            left.close()

    assert [e.kind for e in seen_events].count("outbox_recovered") == 1
    recovered = [e for e in _events(col) if e["kind"] == "outbox_recovered"]
    assert len(recovered) == 1 and recovered[0]["detail"]["kept_in_memory"] > 40
    assert st["dropped"]["memory_full"] == 0 and st["outbox"]["dropped"] == 0
    # every sample of every interval counted once, each channel's seq contiguous from 0 and
    # in time order (blocks straddle interval edges: n_blocks + 1 intervals; an idle pause may
    # close an interval early, so a few intervals come in two parts, never out of order)
    for ch in ("sg1", "sg2", "load"):
        docs = _values(col, ch)
        assert [d["seq"] for d in docs] == list(range(len(docs)))
        assert len(docs) >= n_blocks + 1
        assert [d["start_ns"] for d in docs] == sorted(d["start_ns"] for d in docs)
        assert sum(d["count"] for d in docs) == n_blocks * ROWS
    ev_seq = [json.loads(m.payload)["seq"] for m in col.on(base("events"))]
    assert sorted(set(ev_seq)) == list(range(len(set(ev_seq))))


def test_read_only_outbox_bounded_memory_drops_oldest_and_announces(
        mosquitto_broker, collector_factory, tmp_path, monkeypatch):
    col = collector_factory(mosquitto_broker.host, mosquitto_broker.port, [base("#")],
                            client_id="historian-ro")
    col.wait_connected()
    layout = make_layout()
    readonly = {"on": False}
    real_write = Outbox._write_record
    real_check = Outbox.check_writable

    def write_record(self, seg, head, body):
        if readonly["on"]:
            raise OSError(errno.EROFS, os.strerror(errno.EROFS))
        return real_write(self, seg, head, body)

    def check_writable(self):
        if readonly["on"]:
            raise OSError(errno.EROFS, os.strerror(errno.EROFS))
        return real_check(self)

    monkeypatch.setattr(Outbox, "_write_record", write_record)
    monkeypatch.setattr(Outbox, "check_writable", check_writable)
    cfg = feed_config(mosquitto_broker, tmp_path)
    feed = Feed(cfg, STATION, [layout], {"site": "hall 2"}, health)
    feed.outbox_retry_s = 0.3
    n_blocks = 0
    try:
        feed.start()
        wait_until(lambda: feed.status()["connected"], what="feed connected")
        feed.memory_max_bytes = 8000                      # about a dozen value messages
        readonly["on"] = True
        mosquitto_broker.stop()
        for _ in range(30):
            assert feed.submit(make_block(layout, n_blocks * ROWS, np.full((ROWS, 3), 1.5)))
            n_blocks += 1
        st = wait_until(lambda: (s := feed.status())["dropped"]["memory_full"] > 20 and s,
                        what="memory drops")
        assert st["outbox"]["state"] == "unwritable" and "Read-only" in st["outbox"]["error"]
        assert st["outbox"]["memory"]["bytes"] <= 8000
        mosquitto_broker.start()
        readonly["on"] = False
        wait_until(lambda: any(e["kind"] == "feed_drop" and "memory" in e["detail"]["reason"]
                               for e in _events(col)), 20, "memory drop announced")
        for _ in range(3):
            assert feed.submit(make_block(layout, n_blocks * ROWS, np.full((ROWS, 3), 1.5)))
            n_blocks += 1
        wait_until(lambda: feed.status()["outbox"]["state"] == "ok", what="recovery")
        records = feed._outbox.next_record
        # the last block's second interval is published after the idle time
        last_start = (make_block(layout, (n_blocks - 1) * ROWS, np.zeros((ROWS, 3))).raw.t0_ns
                      + (ROWS - 1) * layout.period_ns) // 500_000_000 * 500_000_000
        wait_until(lambda: all(_values(col, ch) and _values(col, ch)[-1]["start_ns"] == last_start
                               for ch in ("sg1", "sg2", "load")), 20, "last values")
        st = feed.status()
    finally:
        feed.stop(timeout_s=2.0)
    assert records > 0 and st["outbox"]["depth"] == 0
    dropped = st["dropped"]["memory_full"]
    got = {ch: _values(col, ch) for ch in ("sg1", "sg2", "load")}
    # the oldest went, the rest arrived in order: seqs only rise, never repeat, and every
    # missing value message is among the counted drops (events share the memory queue)
    last = got["sg1"][-1]["seq"]
    for docs in got.values():
        seqs = [d["seq"] for d in docs]
        assert seqs == sorted(set(seqs))
        assert seqs[-6:] == list(range(last - 5, last + 1))    # the newest all arrived
    missing = 3 * (last + 1) - sum(len(v) for v in got.values())
    assert 20 < missing <= dropped
