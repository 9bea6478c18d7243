"""serial-frames and serial-lines drivers over real pseudo-terminals and pyserial's loop://."""

from __future__ import annotations

import itertools
import os
import re
import subprocess
import sys
import threading
import time
import tty

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from straind.block import Quality
from straind.drivers.base import ChannelSetup, DeviceSetup, DriverIOError
from straind.drivers.framing import (FrameParser, FrameType, NakReason, data_frame_bytes,
                                     encode_data_frames, encode_frame)
from straind.drivers.serial_frames import CommandRefused, SerialFrames
from straind.drivers.serial_lines import LineParser, SerialLines, encode_lines
from straind.drivers.serialport import PortBusy, loopback_pattern
from straind.plugins import load_driver
from straind.schema import ConfigError

RNG = np.random.default_rng(99)


_NAMES = itertools.count()


def _setup(m: int, rate: float = 1000.0, block: int = 50, columns: list[int] | None = None,
           name: str | None = None) -> DeviceSetup:
    # a fresh device name each time: the driver remembers frame counters per device and port
    name = name or f"dev{next(_NAMES)}"
    chans = tuple(ChannelSetup(f"c{i}", i, {}, {} if columns is None else {"column": columns[i]})
                  for i in range(m))
    return DeviceSetup(name, rate, block, chans, {"adc": {"gain": 128}})


def _codes(n: int, m: int) -> np.ndarray:
    return RNG.integers(-(1 << 23) + 1, (1 << 23) - 1, size=(n, m)).astype(np.int32)


class Pty:
    """A pseudo-terminal: the test writes the front-end's side (master), the driver opens the
    slave path."""

    def __init__(self) -> None:
        self.master, self.slave = os.openpty()
        tty.setraw(self.slave)
        self.path = os.ttyname(self.slave)

    def write(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            n = os.write(self.master, view[:4096])
            view = view[n:]

    def close(self) -> None:
        for fd in (self.master, self.slave):
            try:
                os.close(fd)
            except OSError:
                pass


@pytest.fixture
def pty_pair():
    p = Pty()
    yield p
    p.close()


def _read_blocks(drv, n_samples: int, timeout_s: float = 5.0) -> list:
    blocks, got = [], 0
    deadline = time.monotonic() + timeout_s
    while got < n_samples and time.monotonic() < deadline:
        b = drv.read_block(0.2)
        if b is not None:
            blocks.append(b)
            got += b.n_samples
    return blocks


class Writer(threading.Thread):
    """Writes bytes to the master side in the background (a pty holds only a few kB)."""

    def __init__(self, pty: Pty, data: bytes, chunk: int = 3000):
        super().__init__(daemon=True)
        self.pty, self.data, self.chunk = pty, data, chunk

    def run(self) -> None:
        for i in range(0, len(self.data), self.chunk):
            self.pty.write(self.data[i:i + self.chunk])


# -- options ----------------------------------------------------------------------------------

def test_entry_points_and_option_validation() -> None:
    assert load_driver("serial-frames") is SerialFrames
    assert load_driver("serial-lines") is SerialLines
    with pytest.raises(ConfigError, match=r"options\.baud\b.*unknown key"):
        SerialFrames(_setup(2), {"port": "loop://", "baud": 9600})
    with pytest.raises(ConfigError, match=r"options\.port.*required"):
        SerialLines(_setup(2), {})
    with pytest.raises(ConfigError, match="separator"):
        SerialLines(_setup(2), {"port": "loop://", "separator": "ab"})
    d = SerialFrames(_setup(2), {"port": "loop://"})
    assert d.opts["baudrate"] == 921600 and d.opts["exclusive"] is True
    assert SerialLines(_setup(2), {"port": "loop://"}).opts["baudrate"] == 115200
    with pytest.raises(ConfigError, match=r"channels\[1\]\.options\.column"):
        SerialFrames.check_setup(_setup(2, columns=[3, 3]), {"port": "x"}, "devices[0]")
    with pytest.raises(ConfigError, match="beyond"):
        SerialFrames.check_setup(_setup(2, columns=[0, 4]), {"port": "x", "frame_channels": 4},
                                 "devices[0]")


# -- loop:// self-test ------------------------------------------------------------------------

def test_loop_self_test_frames() -> None:
    setup = _setup(3, block=20)
    drv = SerialFrames(setup, {"port": "loop://", "start_command": False})
    drv.open()
    try:
        codes = _codes(40, 3)
        drv.port.write(encode_data_frames(0, codes, 0, 4))
        blocks = _read_blocks(drv, 40)
        assert [b.start_index for b in blocks] == [0, 20]
        np.testing.assert_array_equal(np.concatenate([b.data for b in blocks]), codes)
    finally:
        drv.close()


def test_loop_self_test_lines() -> None:
    drv = SerialLines(_setup(2, block=5), {"port": "loop://", "counter": True})
    drv.open()
    try:
        codes = _codes(11, 2)
        drv.port.write(b"tail of a line cut at open\n" + encode_lines(codes, 100))
        blocks = _read_blocks(drv, 10)
        assert [b.start_index for b in blocks] == [100, 105]
        np.testing.assert_array_equal(np.concatenate([b.data for b in blocks]), codes[:10])
    finally:
        drv.close()


@pytest.mark.parametrize("cls", [SerialFrames, SerialLines])
def test_loopback_test_pattern(cls) -> None:
    setup, options = cls.example()
    assert options["port"] == "loop://" and options["loopback_test_samples"] == 10
    drv = cls(setup, options)
    drv.open()
    try:
        b = drv.read_block(2.0)
    finally:
        drv.close()
    assert b is not None and b.start_index == 0
    np.testing.assert_array_equal(b.data, loopback_pattern(0, 10, 2))
    # the pattern is distinct per sample and channel and stays off the saturation codes
    big = loopback_pattern(0, 5000, 8)
    assert np.unique(big).size == big.size
    assert big.min() > -(1 << 23) and big.max() < (1 << 23) - 1


def test_wrong_channel_count_is_named_in_the_stall_message(pty_pair: Pty) -> None:
    drv = SerialFrames(_setup(4), {"port": pty_pair.path, "start_command": False,
                                   "stall_timeout_s": 0.3})
    drv.open()
    try:
        pty_pair.write(encode_data_frames(0, _codes(40, 6), 0, 4))
        with pytest.raises(DriverIOError, match="sends 6 channels per frame, this device "
                                                "expects 4"):
            for _ in range(20):
                drv.read_block(0.2)
    finally:
        drv.close()


# -- frames over a pty ------------------------------------------------------------------------

def test_corrupted_frames_over_pty_are_lost_exactly(pty_pair: Pty) -> None:
    m, s, k = 4, 5, 2000
    L = data_frame_bytes(m, s)
    codes = _codes(k * s, m)
    frames = np.frombuffer(encode_data_frames(0, codes, 0, s), np.uint8).reshape(k, L).copy()
    rng = np.random.default_rng(3)
    bad = np.sort(rng.choice(np.arange(1, k - 1), size=k // 100, replace=False))
    frames[bad, rng.integers(11, L, bad.size)] ^= np.uint8(0x10)
    drv = SerialFrames(_setup(m, block=37), {"port": pty_pair.path, "start_command": False})
    drv.open()
    try:
        w = Writer(pty_pair, frames.tobytes())
        w.start()
        blocks = _read_blocks(drv, (k - bad.size) * s)
        w.join()
    finally:
        drv.close()
    got = sum(b.n_samples for b in blocks)
    assert got == (k - bad.size) * s
    lost = set()
    for b in blocks:                      # every block is consecutive samples: no block spans
        np.testing.assert_array_equal(b.data, codes[b.start_index:b.start_index + b.n_samples])
        assert b.n_samples <= 37
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    lost = np.setdiff1d(np.arange(k * s), idx)
    np.testing.assert_array_equal(lost, (bad[:, None] * s + np.arange(s)).ravel())
    c = drv.counters
    assert c["crc_errors"] == bad.size
    assert c["lost_frames"] == bad.size and c["lost_samples"] == bad.size * s
    runs = 1 + int(np.count_nonzero(np.diff(bad) > 1))
    assert c["resyncs"] == runs
    q = np.concatenate([b.quality for b in blocks])
    after = np.flatnonzero(q[:, 0] & Quality.AFTER_GAP)
    first_after = np.setdiff1d(bad + 1, bad) * s
    np.testing.assert_array_equal(idx[after], first_after)
    gaps = [e for e in drv.drain_events() if e.kind == "gap"]
    assert len(gaps) == runs
    assert sum(e.detail["frames"] for e in gaps) == bad.size


def test_counter_wrap_restart_duplicate_and_status(pty_pair: Pty) -> None:
    m, s = 3, 2
    drv = SerialFrames(_setup(m, block=4), {"port": pty_pair.path, "start_command": False})
    drv.open()
    try:
        first = (1 << 32) - 3
        a = _codes(6 * s, m)
        status = np.zeros((6, m), np.uint8)
        status[4] = [Quality.SATURATED, Quality.OPEN_BRIDGE, Quality.EXCITATION_FAULT | 0x80]
        status[5, 1] = Quality.SHUNT_ON
        data = encode_data_frames(first, a, status, s)      # counters 2**32-3 .. 2
        data += encode_data_frames(2, _codes(s, m), 0, s)    # a duplicate of counter 2
        pty_pair.write(data)
        blocks = _read_blocks(drv, 12)
        idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
        np.testing.assert_array_equal(idx, first * s + np.arange(12))   # unwrapped past 2**32
        np.testing.assert_array_equal(np.concatenate([b.data for b in blocks]), a)
        q = np.concatenate([b.quality for b in blocks])
        assert q[8:10].tolist() == [[1, 2, 4]] * 2                       # reserved bit 0x80 gone
        assert q[10:12, 1].tolist() == [64, 64]
        # the counter jumps back: the front-end restarted; numbering continues after the last
        # sample plus the frames the host clock says were missed meanwhile (none or a few)
        t_last = time.monotonic()
        pty_pair.write(encode_data_frames(0, _codes(4 * s, m), 0, s))
        more = _read_blocks(drv, 8)
        skipped = more[0].start_index - (first * s + 12)
        assert 0 <= skipped <= (time.monotonic() - t_last) * 1000 + 2 * s
        assert skipped == drv.counters.get("lost_samples", 0)
        assert more[0].quality[0, 0] & Quality.AFTER_GAP
        assert drv.counters["duplicate_frames"] == 1
        assert drv.counters["frontend_restarts"] == 1
    finally:
        drv.close()


def test_column_mapping(pty_pair: Pty) -> None:
    drv = SerialFrames(_setup(2, block=6, columns=[4, 1]),
                       {"port": pty_pair.path, "start_command": False, "frame_channels": 6})
    drv.open()
    try:
        codes = _codes(6, 6)
        pty_pair.write(encode_data_frames(0, codes, 0, 3))
        b = _read_blocks(drv, 6)[0]
        np.testing.assert_array_equal(b.data, codes[:, [4, 1]])
    finally:
        drv.close()


def test_vanish_delivers_pending_then_raises_within_two_seconds() -> None:
    p = Pty()
    drv = SerialFrames(_setup(2, block=100), {"port": p.path, "start_command": False})
    drv.open()
    try:
        codes = _codes(30, 2)
        p.write(encode_data_frames(0, codes, 0, 3))
        assert drv.read_block(0.3) is None                  # 30 of 100 samples: not yet
        t0 = time.monotonic()
        p.close()                                            # unplugged: the slave reads EIO
        b = drv.read_block(2.0)
        assert b is not None and b.n_samples == 30           # nothing received is lost
        np.testing.assert_array_equal(b.data, codes)
        with pytest.raises(DriverIOError, match=re.escape(p.path)):
            while time.monotonic() - t0 < 3:
                drv.read_block(0.25)
        assert time.monotonic() - t0 < 2.0
    finally:
        drv.close()
    with pytest.raises(DriverIOError, match="not found|cannot be opened"):
        t0 = time.monotonic()
        drv.open()
    assert time.monotonic() - t0 < 1.0


def test_stall_raises(pty_pair: Pty) -> None:
    drv = SerialFrames(_setup(2), {"port": pty_pair.path, "start_command": False,
                                   "stall_timeout_s": 0.4})
    drv.open()
    try:
        t0 = time.monotonic()
        with pytest.raises(DriverIOError, match="stalled"):
            while time.monotonic() - t0 < 3:
                drv.read_block(0.25)
        assert 0.35 < time.monotonic() - t0 < 1.5
    finally:
        drv.close()


def test_absent_port_fails_fast() -> None:
    drv = SerialFrames(_setup(1), {"port": "/dev/serial/by-id/usb-no-such-device-if00"})
    t0 = time.monotonic()
    with pytest.raises(DriverIOError, match="usb-no-such-device.*not found"):
        drv.open()
    assert time.monotonic() - t0 < 0.5
    drv.close()
    drv.close()


def test_second_process_is_refused(pty_pair: Pty) -> None:
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import serial, sys, time\n"
         f"s = serial.serial_for_url({pty_pair.path!r}, exclusive=True)\n"
         "print('holding', flush=True)\n"
         "sys.stdin.readline()\n"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "holding"
        drv = SerialFrames(_setup(1), {"port": pty_pair.path, "start_command": False})
        busy = re.escape(pty_pair.path) + " is in use by another process"
        with pytest.raises(PortBusy, match=busy):
            drv.open()
    finally:
        holder.communicate("\n", timeout=10)
    drv.open()                                              # free again: opens
    drv.close()


class FakeFrontEnd(threading.Thread):
    """Answers commands on the master side: ACK, except NAK for SHUNT on channel 5 and
    silence for SET_GAIN."""

    def __init__(self, p: Pty):
        super().__init__(daemon=True)
        self.p, self.stop = p, threading.Event()
        self.seen: list[tuple[int, bytes]] = []

    def run(self) -> None:
        parser = FrameParser(None)
        import select
        while not self.stop.is_set():
            r, _, _ = select.select([self.p.master], [], [], 0.05)
            if not r:
                continue
            for cf in parser.feed(os.read(self.p.master, 4096)).controls:
                self.seen.append((cf.frame_type, cf.payload))
                if cf.frame_type == FrameType.SET_GAIN:
                    continue
                bad = cf.frame_type == FrameType.SHUNT and cf.payload[0] == 5
                answer = FrameType.NAK if bad else FrameType.ACK
                reason = NakReason.BAD_ARGUMENT if bad else 0
                self.p.write(encode_frame(answer, cf.seq, bytes((cf.frame_type, reason))))
                if cf.frame_type == FrameType.START:
                    self.p.write(encode_data_frames(0, np.ones((10, 6), np.int32), 0, 5))


def test_commands_ack_nak_and_timeout(pty_pair: Pty) -> None:
    fe = FakeFrontEnd(pty_pair)
    fe.start()
    drv = SerialFrames(_setup(2, block=10, columns=[0, 5]),
                       {"port": pty_pair.path, "frame_channels": 6, "set_rate": True,
                        "command_timeout_s": 0.3})
    try:
        drv.open()                                          # SET_RATE, then START, both ACKed
        assert [t for t, _ in fe.seen] == [FrameType.SET_RATE, FrameType.START]
        assert int.from_bytes(fe.seen[0][1], "big") == 1_000_000          # 1000 Hz in mHz
        drv.set_shunt(0, True)
        assert fe.seen[-1] == (FrameType.SHUNT, bytes((0, 1)))
        with pytest.raises(CommandRefused, match="bad argument"):
            drv.set_shunt(1, True)                          # channel index 1 is column 5
        t0 = time.monotonic()
        with pytest.raises(DriverIOError, match="did not acknowledge SET_GAIN"):
            drv.set_gain(64)
        assert 0.5 < time.monotonic() - t0 < 2.0            # two attempts of 0.3 s
        b = drv.read_block(1.0)                             # data sent meanwhile was kept
        assert b is not None and b.n_samples == 10 and b.start_index == 0
    finally:
        drv.close()
        time.sleep(0.1)
        fe.stop.set()
        fe.join()
    assert fe.seen[-1][0] == FrameType.STOP


def test_reconnect_gap_counted_by_a_new_driver_instance() -> None:
    p = Pty()
    setup = _setup(2, block=10, name="reconnect-dev")
    drv = SerialFrames(setup, {"port": p.path, "start_command": False})
    drv.open()
    codes = _codes(40, 2)
    p.write(encode_data_frames(100, codes[:20], 0, 5))       # frames 100..103
    assert sum(b.n_samples for b in _read_blocks(drv, 20)) == 20
    drv.close()
    drv2 = SerialFrames(setup, {"port": p.path, "start_command": False})    # as the supervisor
    drv2.open()
    try:
        p.write(encode_data_frames(110, codes[20:], 0, 5))   # frames 104..109 were missed
        b = _read_blocks(drv2, 20)
        assert b[0].start_index == 550 and b[0].quality[0, 0] & Quality.AFTER_GAP
        assert drv2.counters["lost_frames"] == 6
        gap = [e for e in drv2.drain_events() if e.kind == "gap"][0]
        assert gap.detail["first_lost_index"] == 520 and gap.detail["samples"] == 30
    finally:
        drv2.close()
        p.close()


# -- lines ------------------------------------------------------------------------------------

def test_lines_over_pty_with_counter_bad_lines_and_gaps(pty_pair: Pty) -> None:
    drv = SerialLines(_setup(2, block=8), {"port": pty_pair.path, "counter": True,
                                           "counter_modulo": 1000})
    drv.open()
    try:
        codes = _codes(30, 2)
        text = encode_lines(codes, 990, ",", 1000).split(b"\n")
        text[3] = b"993,12x,5"                 # unreadable field
        text[4] = b"994,1"                     # a field missing
        text[5] = b"995,1,9000000"             # beyond 24 bits
        text[6] = b"# front-end says hello"
        text[7] = b""
        stream = b"partial line\n" + b"\r\n".join(text)
        pty_pair.write(stream)
        blocks = _read_blocks(drv, 24)
    finally:
        drv.close()
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    data = np.concatenate([b.data for b in blocks])
    keep = [i for i in range(30) if i not in (3, 4, 5, 6, 7)]
    np.testing.assert_array_equal(idx, 990 + np.array(keep))     # counter wrapped at 1000
    np.testing.assert_array_equal(data, codes[keep])
    q = np.concatenate([b.quality for b in blocks])
    assert idx[np.flatnonzero(q[:, 0] & Quality.AFTER_GAP)].tolist() == [998]
    assert drv.counters["bad_lines"] == 3 and drv.counters["message_lines"] == 1
    assert drv.counters["lost_samples"] == 5
    texts = [e.detail["text"] for e in drv.drain_events() if e.kind == "frontend_message"]
    assert texts == ["# front-end says hello"]


def test_lines_without_counter_custom_separator_and_columns(pty_pair: Pty) -> None:
    drv = SerialLines(_setup(2, block=4, columns=[2, 0]),
                      {"port": pty_pair.path, "separator": ";", "fields": 3})
    drv.open()
    try:
        pty_pair.write(b"junk\n1; 2; 3\n4;5;6\n7;;9\n10;11;12;13\n14 ;15; 16\n17;18;19\n")
        blocks = _read_blocks(drv, 4)
    finally:
        drv.close()
    data = np.concatenate([b.data for b in blocks])
    assert data.tolist() == [[3, 1], [6, 4], [16, 14], [19, 17]]
    idx = np.concatenate([b.start_index + np.arange(b.n_samples) for b in blocks])
    assert idx.tolist() == [0, 1, 4, 5]        # two bad lines: two lost samples
    assert drv.counters["bad_lines"] == 2


_FIELD = re.compile(rb"[+-]?\d+")


def _reference_parse(line: bytes, n: int) -> list[int] | None:
    """Independent reference, one line at a time with re and int(): fields separated by a
    comma (spaces around it ignored) or by spaces; one trailing comma allowed; an empty field
    or anything but an optionally signed integer makes the line bad."""
    if line.startswith(b"#"):
        return None
    body = line.strip(b" \t\r")
    if not body:
        return None
    if body.endswith(b","):
        body = body[:-1].rstrip(b" \t\r")
    fields = re.split(rb"[ \t\r]*,[ \t\r]*|[ \t\r]+", body)
    if not all(_FIELD.fullmatch(f) and len(f) <= 18 for f in fields) or len(fields) < n:
        return []
    return [int(f) for f in fields[:n]]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(
    st.lists(st.integers(-(1 << 23), (1 << 23) - 1), min_size=0, max_size=5).map(
        lambda v: " ".join(map(str, v)).encode()),
    st.lists(st.integers(-999, 999), min_size=1, max_size=5).map(
        lambda v: ", ".join(map(str, v)).encode()),
    st.text(alphabet="0123456789+-, \t\rx#", max_size=20).map(str.encode),
), max_size=30), st.integers(1, 3))
def test_vectorised_line_parser_matches_reference(lines: list[bytes], n: int) -> None:
    lines = [ln.replace(b"\n", b"") for ln in lines]
    parser = LineParser(n, None, None, skip_first=False)
    out = parser.feed(b"\n".join(lines) + b"\n")
    expected, ordinals, bad, ordinal = [], [], 0, 0
    for ln in lines:
        ref = _reference_parse(ln, n)
        if ref is None:
            continue
        if ref:
            expected.append(ref)
            ordinals.append(ordinal)
        else:
            bad += 1
        ordinal += 1
    assert out.values.tolist() == expected
    assert out.ordinal.tolist() == ordinals
    assert out.bad_lines == bad
