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


def _files(path: str, suffix: str) -> list[str]:
    return sorted(os.path.join(path, n) for n in os.listdir(path) if n.endswith(suffix))


def _segments(path: str) -> list[str]:
    return _files(path, ".seg")


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


# ------------------------------------------------------------------- checks and segment reuse

def test_record_checks_match_published_values():
    from straind.outbox import MAGIC_CRC32, MAGIC_CRC32C, record_crc
    # CRC-32C examples of RFC 3720 (iSCSI), appendix B.4, there given as the CRC's bytes in
    # transmission order (aa 36 91 8a for 32 zero bytes, and so on)
    assert record_crc(MAGIC_CRC32C, bytes(32)) == 0x8A9136AA
    assert record_crc(MAGIC_CRC32C, b"\xff" * 32) == 0x62A8AB43
    assert record_crc(MAGIC_CRC32C, bytes(range(32))) == 0x46DD794E
    assert record_crc(MAGIC_CRC32C, bytes(range(31, -1, -1))) == 0x113FDB5C
    # parts chain like one buffer
    assert record_crc(MAGIC_CRC32C, bytes(range(10)), bytes(range(10, 32))) == 0x46DD794E
    # CRC-32 (zlib's, ISO-HDLC): the usual check value of the ASCII digits 1-9 (common practice:
    # every CRC catalogue lists it)
    assert record_crc(MAGIC_CRC32, b"123456789") == 0xCBF43926
    assert record_crc(MAGIC_CRC32, b"1234", b"56789") == 0xCBF43926


def test_records_with_the_older_crc32_check_are_read_back(tmp_path, monkeypatch):
    import straind.outbox as outbox_mod
    path = str(tmp_path / "ob")
    monkeypatch.setattr(outbox_mod, "MAGIC", outbox_mod.MAGIC_CRC32)
    ob = Outbox(path)
    old = fill(ob, 20)
    ob.close()
    monkeypatch.undo()
    assert open(_segments(path)[0], "rb").read(4) == b"SOBX"
    ob2 = Outbox(path)
    assert ob2.corrupt == 0
    new = fill(ob2, 5)
    ob2.close()
    ob3 = Outbox(path)                  # both kinds in one segment
    got = drain(ob3)
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == old + new
    assert ob3.corrupt == 0
    ob3.close()


def _spares(path: str) -> list[str]:
    return _files(path, ".spare")


def test_emptied_segments_are_reused_and_their_stale_records_never_return(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path, segment_bytes=1024, max_bytes=1 << 20)
    fill(ob, 60)                         # records of 43..123 bytes: several segments
    assert len(_segments(path)) > 3
    drain(ob)                            # everything acknowledged
    ob.sync()                            # ... and on record: the segments become spares
    spares = _spares(path)
    assert spares and len(_segments(path)) == 1
    inodes = {os.stat(p).st_ino for p in spares}
    written = fill(ob, 40)
    reused = [p for p in _segments(path) if os.stat(p).st_ino in inodes]
    assert reused, "a new segment should be a spare renamed"
    # the stale bytes past the new records are still there (written over, not cut)
    ob.close()
    assert any(os.path.getsize(p) > 0 for p in reused)
    ob2 = Outbox(path)
    assert ob2.corrupt == 0
    got = drain(ob2, ack=False)
    assert [(g.rec, g.topic, g.seq, g.payload) for g in got] == written
    ob2.close()


def _reused_segment_with_a_short_tail(path: str, close: bool = False) -> tuple[list, str, int]:
    """An outbox whose open segment is a reused file, left as a kill leaves it (or closed);
    returns (records written since the reuse began, that segment's path, the end of its last
    record)."""
    ob = Outbox(path, segment_bytes=1024, max_bytes=1 << 20)
    fill(ob, 60)
    drain(ob)
    ob.sync()
    spare_inodes = {os.stat(p).st_ino for p in _spares(path)}
    while True:
        written = fill(ob, 1)
        if os.stat(ob._wseg.path).st_ino in spare_inodes:
            break
        drain(ob)                       # the records before the reused segment are acked
    written += fill(ob, 2)
    seg, end = ob._wseg.path, ob._wseg.size
    if close:
        ob.close()
    else:
        ob.sync()                       # the state on disk; the files as they are
    return written, seg, end


def test_record_cut_short_over_stale_records_is_discarded(tmp_path):
    path = str(tmp_path / "ob")
    written, seg, end = _reused_segment_with_a_short_tail(path)
    data = bytearray(open(seg, "rb").read())
    assert len(data) > end + 200, "stale bytes should follow the records"
    # a kill cut the next record short over the stale bytes: a copy of the last record,
    # renumbered as the next, of which only the first half reached the file
    last_len = len(written[-1][3]) + RECORD_HEADER.size + len(written[-1][1])
    torn = bytearray(data[end - last_len:end])
    assert RECORD_HEADER.unpack_from(torn, 0)[3] == written[-1][0]
    torn[12:20] = (written[-1][0] + 1).to_bytes(8, "little")
    data[end:end + last_len // 2] = torn[:last_len // 2]
    open(seg, "r+b").write(bytes(data))
    ob2 = Outbox(path)
    assert ob2.corrupt == 1             # worth a word: a record of this segment, cut short
    got = drain(ob2, ack=False)
    assert [(g.rec, g.payload) for g in got] == [(w[0], w[3]) for w in written]
    rec, _ = ob2.append("b", b"after the cut")      # appends go on over the cut
    ob2.close()
    ob3 = Outbox(path)
    got = drain(ob3, ack=False)
    assert [(g.rec, g.payload) for g in got][-1] == (rec, b"after the cut")
    assert len(got) == len(written) + 1 and ob3.corrupt == 1
    ob3.close()


def test_stale_bytes_of_a_reused_file_are_not_damage(tmp_path, caplog):
    path = str(tmp_path / "ob")
    written, seg, end = _reused_segment_with_a_short_tail(path)
    assert os.path.getsize(seg) > end
    ob = Outbox(path)                   # as after a kill: the stale bytes are still there
    assert ob.corrupt == 0
    assert not [r for r in caplog.records if r.levelname == "WARNING"]
    assert [(g.rec, g.payload) for g in drain(ob, ack=False)] == [(w[0], w[3]) for w in written]
    ob.close()


def test_a_closed_or_rolled_reused_segment_is_cut_after_its_last_record(tmp_path):
    path = str(tmp_path / "ob")
    written, seg, end = _reused_segment_with_a_short_tail(path, close=True)
    assert os.path.getsize(seg) == end
    # every segment but the open one ends at its last record
    ob = Outbox(path, segment_bytes=1024, max_bytes=1 << 20)
    for _ in range(3):
        fill(ob, 30)
        drain(ob)
        ob.sync()
    spares = {os.stat(p).st_ino for p in _spares(path)}
    assert spares
    fill(ob, 60)                        # unacknowledged: rolled segments stay
    rolled = _segments(path)[:-1]
    assert len(rolled) >= 2 and any(os.stat(p).st_ino in spares for p in rolled)
    for s in rolled:
        assert os.path.getsize(s) == next(x.size for x in ob._segments if x.path == s)
    ob.close()


def test_spares_are_given_up_before_unsent_records(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path, segment_bytes=4096, max_bytes=32 * 1024)
    fill(ob, 120)
    drain(ob)
    ob.sync()
    assert _spares(path)
    dropped_before = ob.dropped
    # fill to the bound with unsent records: the spares go first, then the oldest records
    for i in range(200):
        ob.append("z", i.to_bytes(4, "little") + b"." * 200)
        assert ob.bytes + ob.stats()["spare_bytes"] <= 32 * 1024 + 4096
    assert ob.stats()["spare_bytes"] == 0
    assert ob.dropped > dropped_before
    ob.sync()
    assert not _spares(path)
    ob.close()


def test_sigkill_while_writing_over_reused_segments_loses_nothing_stored(tmp_path):
    """Real kills of a writer that keeps acknowledging, so that new records keep going into
    reused files over stale ones: after each, the log holds every record not acknowledged, in
    order, each with its own bytes, and the next writer carries on from there."""
    path = str(tmp_path / "ob")
    child = textwrap.dedent(f"""
        import sys
        from straind.outbox import Outbox
        ob = Outbox({path!r}, segment_bytes=2048, max_bytes=1 << 20, sync_interval_s=0.0)
        i = ob.next_record
        handed = []
        while True:
            # each record's payload names its record number, so a stale one would show
            rec, _ = ob.append("k/" + str(i % 3), b"%08d:" % i + bytes([i % 251]) * (i % 90))
            assert rec == i
            i += 1
            r = ob.next_unsent()
            if r is not None:
                handed.append(r.rec)
            if len(handed) > 5:                 # acknowledge all but the newest few
                for x in handed[:-5]:
                    ob.ack(x)
                handed = handed[-5:]
                ob.maybe_sync()
            if i % 200 == 0:
                print(i, ob.segments_reused, flush=True)
    """)
    reused = 0
    for round_ in range(6):
        proc = subprocess.Popen([sys.executable, "-c", child], stdout=subprocess.PIPE, text=True)
        try:
            for _ in range(3 + round_):          # kill at different points
                line = proc.stdout.readline()
                assert line, "the writer died"
            reported, reused_now = map(int, line.split())
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
        reused += reused_now
        ob = Outbox(path)
        # at most one record cut short per kill
        assert ob.corrupt <= round_ + 1, (round_, ob.corrupt, os.listdir(path))
        got = drain(ob, ack=False)
        assert got, "unacknowledged records must survive"
        recs = [g.rec for g in got]
        assert recs == list(range(recs[0], recs[0] + len(recs))), recs
        assert recs[-1] + 1 >= reported, (recs[-1], reported)   # none finished is missing
        for g in got:
            assert g.payload == b"%08d:" % g.rec + bytes([g.rec % 251]) * (g.rec % 90)
            assert g.topic == "k/" + str(g.rec % 3)
        ob.close()
    assert reused, "the writer should have written over spare segments"


def test_a_damaged_region_is_counted_once_however_often_the_log_is_opened(tmp_path):
    path = str(tmp_path / "ob")
    ob = Outbox(path, segment_bytes=1024)
    fill(ob, 40)
    ob.close()
    first = _segments(path)[0]
    data = bytearray(open(first, "rb").read())
    length = RECORD_HEADER.unpack_from(data, 0)[1]
    data[length + 45] ^= 0xFF              # the second record of an earlier segment
    open(first, "wb").write(bytes(data))
    for _ in range(3):                      # skipped (it cannot be cut), reported once
        ob = Outbox(path, segment_bytes=1024)
        assert ob.corrupt == 1
        ob.close()
