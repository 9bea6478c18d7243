"""The disk outbox of the MQTT feed: order, acknowledgement, bounds, restarts and damage."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap

import pytest

from straind.outbox import RECORD_HEADER, Outbox


def payload_for(topic: str, i: int) -> bytes:
    return f"{topic}:{i}:".encode() + bytes([i % 251]) * (i % 37)


def fill(ob: Outbox, n: int, topics=("a/x", "a/y", "b")) -> list[tuple[int, str, int, bytes]]:
    """Append n records over the topics; returns (rec, topic, seq, payload)."""
    out = []
    for i in range(n):
        t = topics[i % len(topics)]
        p = payload_for(t, i)
        rec, seq = ob.append(t, p)
        out.append((rec, t, seq, p))
    return out


def drain(ob: Outbox, ack: bool = True):
    got = []
    while True:
        r = ob.next_unsent()
        if r is None:
            return got
        got.append(r)
        if ack:
            ob.ack(r.rec)


def test_records_come_out_in_order_with_per_topic_sequence(tmp_path):
    ob = Outbox(str(tmp_path / "ob"))
    written = fill(ob, 300)
    assert [w[0] for w in written] == list(range(300))
    # per-topic sequence numbers count 0, 1, 2 ... independently
    for topic in ("a/x", "a/y", "b"):
        assert [w[2] for w in written if w[1] == topic] == list(range(100))
    got = drain(ob)
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == written
    assert ob.depth == 0
    ob.close()


def test_payload_callable_gets_the_sequence_number(tmp_path):
    ob = Outbox(str(tmp_path / "ob"))
    for _ in range(3):
        ob.append("t", lambda seq: json.dumps({"seq": seq}).encode())
    assert [json.loads(r.payload)["seq"] for r in drain(ob)] == [0, 1, 2]
    ob.close()


def test_ack_position_advances_only_over_contiguous_acks(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    fill(ob, 6)
    handed = [ob.next_unsent() for _ in range(6)]
    for r in (handed[2], handed[3], handed[0]):
        ob.ack(r.rec)
    assert ob.acked_position == 0          # record 1 still outstanding
    assert ob.depth == 5
    ob.ack(handed[1].rec)
    assert ob.acked_position == 3
    ob.close()
    ob2 = Outbox(path)                     # records 4 and 5 come back after a restart
    assert [r.rec for r in drain(ob2)] == [4, 5]
    ob2.close()


def test_survives_reopen_and_sequence_continues(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    written = fill(ob, 50)
    for r in drain(ob, ack=False)[:20]:
        ob.ack(r.rec)
    ob.close()
    ob2 = Outbox(path)
    assert ob2.depth == 30
    got = drain(ob2)
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == written[20:]
    rec, seq = ob2.append("a/x", b"next")
    assert rec == 50
    assert seq == max(w[2] for w in written if w[1] == "a/x") + 1
    ob2.close()


def test_reopen_with_everything_acknowledged_then_append(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    fill(ob, 20)
    drain(ob)
    ob.close()
    ob2 = Outbox(path)                 # the last segment is continued by new appends
    assert ob2.depth == 0 and ob2.next_unsent() is None
    written = fill(ob2, 10, topics=("new",))
    assert [(g.rec, g.payload) for g in drain(ob2)] == [(w[0], w[3]) for w in written]
    assert ob2.depth == 0
    ob2.close()


def test_sigkill_of_the_writer_loses_nothing_that_was_flushed(tmp_path):
    path = str(tmp_path / "ob")
    child = textwrap.dedent(f"""
        import sys, time
        from straind.outbox import Outbox
        ob = Outbox({path!r}, sync_interval_s=3600)
        for i in range(500):
            ob.append("k/" + str(i % 2), b"x" * (i % 50) + str(i).encode())
            if i == 199:
                r = [ob.next_unsent() for _ in range(150)]
                for x in r:
                    ob.ack(x.rec)
                ob.sync()        # ack position 149 on disk
        ob.flush()              # in the OS, never fsynced, state not rewritten
        print("ready", flush=True)
        time.sleep(60)
    """)
    proc = subprocess.Popen([sys.executable, "-c", child], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "ready"
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
    ob = Outbox(path)
    got = drain(ob)
    assert [g.rec for g in got] == list(range(150, 500))
    assert [g.payload for g in got] == [b"x" * (i % 50) + str(i).encode() for i in range(150, 500)]
    assert [g.seq for g in got if g.topic == "k/0"] == list(range(75, 250))
    rec, seq = ob.append("k/1", b"after")
    assert (rec, seq) == (500, 250)
    ob.close()


def test_bounded_size_drops_oldest_and_counts(tmp_path):
    ob = Outbox(str(tmp_path / "ob"), max_bytes=64 * 1024, segment_bytes=8 * 1024)
    n = 1000
    for i in range(n):
        ob.append("t", i.to_bytes(4, "little") + b"." * 496)
    assert ob.bytes <= 64 * 1024
    drops = ob.take_drops()
    assert drops and ob.take_drops() == []
    assert sum(d.count for d in drops) == ob.dropped
    got = drain(ob)
    assert ob.dropped + len(got) == n
    idx = [int.from_bytes(g.payload[:4], "little") for g in got]
    # what is left is the newest, contiguous and in order
    assert idx == list(range(n - len(got), n))
    # dropped ranges are the oldest ones, back to back
    assert drops[0].first_rec == 0
    for a, b in zip(drops, drops[1:]):
        assert b.first_rec == a.last_rec + 1
    assert drops[-1].last_rec + 1 == got[0].rec
    ob.close()


def test_drop_while_records_are_in_flight(tmp_path):
    ob = Outbox(str(tmp_path / "ob"), max_bytes=16 * 1024, segment_bytes=4 * 1024)
    fill(ob, 10)
    handed = [ob.next_unsent() for _ in range(5)]
    for i in range(200):
        ob.append("z", b"y" * 200)
    assert ob.dropped > 0
    for r in handed:                   # late acks of dropped records are harmless
        ob.ack(r.rec)
    got = drain(ob)
    assert got and all(g.topic == "z" for g in got)
    assert [g.rec for g in got] == list(range(got[0].rec, got[-1].rec + 1))
    assert ob.dropped + len(got) == 210
    assert ob.depth == 0
    ob.close()


def _segments(path: str) -> list[str]:
    return sorted(os.path.join(path, n) for n in os.listdir(path) if n.endswith(".seg"))


def test_truncated_tail_record_is_skipped_rest_kept(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    written = fill(ob, 40)
    ob.close()
    seg = _segments(path)[-1]
    size = os.path.getsize(seg)
    with open(seg, "r+b") as fh:       # a write cut short by a kill
        fh.truncate(size - 7)
    ob2 = Outbox(path)
    assert ob2.corrupt == 1
    got = drain(ob2)
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == written[:-1]
    # appending goes on cleanly after the cut
    rec, _ = ob2.append("b", b"new")
    ob2.close()
    ob3 = Outbox(path)
    assert [(r.rec, r.payload) for r in drain(ob3)] == [(rec, b"new")]
    assert ob3.corrupt == 1
    ob3.close()


def test_corrupted_middle_record_is_skipped_rest_kept(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    written = fill(ob, 30)
    ob.close()
    seg = _segments(path)[0]
    data = bytearray(open(seg, "rb").read())
    # find record 10 by walking the length fields, then flip a payload byte
    pos = 0
    for _ in range(10):
        pos += RECORD_HEADER.unpack_from(data, pos)[1]
    length = RECORD_HEADER.unpack_from(data, pos)[1]
    data[pos + length - 1] ^= 0xFF
    open(seg, "wb").write(bytes(data))
    ob2 = Outbox(path)
    assert ob2.corrupt == 1
    got = drain(ob2)
    expected = written[:10] + written[11:]
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == expected
    ob2.close()


def test_unlogged_sequence_numbers_never_repeat_after_a_kill(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path)
    first = [ob.allocate_seq("status") for _ in range(5)]
    assert first == [0, 1, 2, 3, 4]
    del ob                              # no close: as after a kill
    ob2 = Outbox(path)
    assert ob2.allocate_seq("status") > 4
    ob2.close()


def test_rewind_hands_out_unacknowledged_again(tmp_path):
    ob = Outbox(str(tmp_path / "ob"))
    fill(ob, 5)
    a = ob.next_unsent()
    ob.ack(a.rec)
    ob.next_unsent()
    ob.next_unsent()
    ob.rewind()
    assert [r.rec for r in drain(ob)] == [1, 2, 3, 4]
    ob.close()


def test_oldest_unacked_time_and_closed_outbox(tmp_path):
    ob = Outbox(str(tmp_path / "ob"))
    assert ob.oldest_unacked_time_ns() is None
    ob.append("t", b"1", time_ns=1_000)
    ob.append("t", b"2", time_ns=2_000)
    assert ob.oldest_unacked_time_ns() == 1_000
    ob.ack(ob.next_unsent().rec)
    assert ob.oldest_unacked_time_ns() == 2_000
    ob.close()
    with pytest.raises(ValueError):
        ob.append("t", b"3")
