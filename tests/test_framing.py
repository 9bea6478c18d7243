"""The framed serial protocol: CRC, frame layout, and the vectorised parser under damage."""

from __future__ import annotations

import binascii
import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from straind.drivers.framing import (CONTROL_LENGTHS, FrameParser, FrameType, NakReason,
                                     crc16_ccitt_false, crc16_columns, crc16_rows,
                                     data_frame_bytes, decode_codes24, encode_command,
                                     encode_data_frames, encode_frame)

RNG = np.random.default_rng(20240601)


def _codes(n: int, m: int, rng: np.random.Generator = RNG) -> np.ndarray:
    return rng.integers(-(1 << 23), 1 << 23, size=(n, m)).astype(np.int32)


# -- CRC ------------------------------------------------------------------------------------

def test_crc_check_value() -> None:
    # CRC catalogue (CRC-16/CCITT-FALSE): check value 0x29B1 for the ASCII bytes "123456789"
    assert crc16_ccitt_false(b"123456789") == 0x29B1
    row = np.frombuffer(b"123456789", dtype=np.uint8)[None, :]
    assert crc16_rows(row).tolist() == [0x29B1]
    assert crc16_columns(row).tolist() == [0x29B1]


def test_crc_implementations_agree_on_random_data() -> None:
    # binascii.crc_hqx (CPython's own table-driven CRC-CCITT, poly 0x1021, no reflection)
    # started at 0xFFFF is the same CRC computed by code we did not write
    for n in [0, 1, 2, 3, 7, 8, 9, 31, 64, 255, 256, 257, 811, 1000, 4097]:
        for k in (1, 5, 600):            # 600 rows takes the many-rows path
            rows = RNG.integers(0, 256, size=(k, n), dtype=np.uint8)
            ref = [binascii.crc_hqx(r.tobytes(), 0xFFFF) for r in rows]
            assert crc16_rows(rows).tolist() == ref, (n, k)
            if k < 600:
                assert crc16_columns(rows).tolist() == ref, (n, k)
                assert [crc16_ccitt_false(r.tobytes()) for r in rows] == ref, (n, k)


def test_crc_of_a_strided_view() -> None:
    buf = RNG.integers(0, 256, size=5000, dtype=np.uint8)
    rows = np.lib.stride_tricks.as_strided(buf[3:], (10, 301), (401, 1))
    ref = [binascii.crc_hqx(r.tobytes(), 0xFFFF) for r in rows]
    assert crc16_rows(rows).tolist() == ref


# -- layout ---------------------------------------------------------------------------------

def test_data_frame_layout_against_struct() -> None:
    # build the frame field by field with struct and the stdlib CRC, independently of the
    # encoder: sync, type, length, counter, channels, samples, status, 24-bit samples, CRC
    codes = np.array([[1, -1, 0x7FFFFF], [-0x800000, 0x123456, -2]], dtype=np.int32)
    status = np.array([0x01, 0x02, 0x44], dtype=np.uint8)
    m, s, seq = 3, 2, 0xFFFFFFFE
    length = 13 + m + 3 * m * s
    body = struct.pack(">BHIBB", 0x01, length, seq, m, s) + bytes(status.tolist())
    for v in codes.ravel().tolist():
        body += (v & 0xFFFFFF).to_bytes(3, "big")
    expected = b"\xA5\x5A" + body + struct.pack(">H", binascii.crc_hqx(body, 0xFFFF))
    assert len(expected) == data_frame_bytes(m, s) == 34
    assert encode_data_frames(seq, codes, status, s) == expected


def test_command_layout() -> None:
    frame = encode_command(FrameType.SHUNT, 0x01020304, channel=2, value=1)
    body = struct.pack(">BHIBB", 0x14, 13, 0x01020304, 2, 1)
    assert frame == b"\xA5\x5A" + body + struct.pack(">H", binascii.crc_hqx(body, 0xFFFF))
    rate = encode_command(FrameType.SET_RATE, 7, rate_hz=2000.0)
    assert rate[9:13] == struct.pack(">I", 2_000_000) and len(rate) == 15
    for t, n in CONTROL_LENGTHS.items():
        assert len(encode_frame(t, 1, b"\0" * (n - 11))) == n


def test_decode_24bit_against_int_from_bytes() -> None:
    # signed 24-bit two's complement, checked against int.from_bytes(signed=True)
    raw = RNG.integers(0, 256, size=(2000, 3), dtype=np.uint8)
    raw[:4] = [[0x7F, 0xFF, 0xFF], [0x80, 0x00, 0x00], [0xFF, 0xFF, 0xFF], [0, 0, 0]]
    ref = [int.from_bytes(bytes(r), "big", signed=True) for r in raw.tolist()]
    assert decode_codes24(raw).tolist() == ref
    assert ref[:4] == [8388607, -8388608, -1, 0]


def test_encoder_refuses_codes_beyond_24_bits() -> None:
    with pytest.raises(ValueError):
        encode_data_frames(0, np.array([[1 << 23]]), 0, 1)


# -- parsing --------------------------------------------------------------------------------

def test_round_trip_with_status_and_wrapping_counter() -> None:
    m, s, k = 5, 4, 300
    codes = _codes(k * s, m)
    status = RNG.integers(0, 256, size=(k, m), dtype=np.uint8)
    data = encode_data_frames((1 << 32) - 100, codes, status, s)
    out = FrameParser(m).feed(data)
    assert out.n_frames == k
    np.testing.assert_array_equal(out.codes, codes)
    np.testing.assert_array_equal(out.status, status & 0x47)     # reserved bits cleared
    expected_seq = ((1 << 32) - 100 + np.arange(k)) % (1 << 32)
    np.testing.assert_array_equal(out.seq, expected_seq)
    assert out.samples_per_frame.tolist() == [s] * k
    assert (out.crc_errors, out.resyncs, out.discarded_bytes) == (0, 0, 0)


def test_frames_split_across_arbitrary_read_boundaries() -> None:
    m, s, k = 3, 2, 400
    codes = _codes(k * s, m)
    data = encode_data_frames(10, codes, 0, s)
    for trial in range(5):
        rng = np.random.default_rng(trial)
        cuts = np.sort(rng.choice(len(data), size=150 * (trial + 1), replace=False))
        parser = FrameParser(m)
        pieces = np.split(np.frombuffer(data, dtype=np.uint8), cuts)
        got = [parser.feed(p.tobytes()) for p in pieces]
        np.testing.assert_array_equal(np.concatenate([g.codes for g in got]), codes)
        assert np.concatenate([g.seq for g in got]).tolist() == list(range(10, 10 + k))
        assert parser.total_discarded == 0 and parser.total_resyncs == 0
    parser = FrameParser(m)                                       # one byte at a time
    got = [parser.feed(data[i:i + 1]) for i in range(len(data) // 4)]
    n = sum(g.n_frames for g in got)
    assert n == (len(data) // 4) // data_frame_bytes(m, s)
    np.testing.assert_array_equal(np.concatenate([g.codes for g in got]), codes[:n * s])


def test_one_percent_corrupted_frames_are_lost_exactly() -> None:
    m, s, k = 8, 4, 5000
    L = data_frame_bytes(m, s)
    codes = _codes(k * s, m)
    frames = np.frombuffer(encode_data_frames(0, codes, 0, s), dtype=np.uint8).reshape(k, L).copy()
    rng = np.random.default_rng(5)
    bad = np.sort(rng.choice(k, size=k // 100, replace=False))
    # one byte flipped anywhere after the sync word and header (status, samples or CRC)
    where = rng.integers(11, L, size=bad.size)
    frames[bad, where] ^= rng.integers(1, 256, size=bad.size).astype(np.uint8)
    stream = frames.tobytes()
    parser = FrameParser(m)
    cuts = np.sort(rng.choice(len(stream), size=700, replace=False))
    got = [parser.feed(p.tobytes()) for p in np.split(np.frombuffer(stream, np.uint8), cuts)]
    seq = np.concatenate([g.seq for g in got])
    good = np.setdiff1d(np.arange(k), bad)
    np.testing.assert_array_equal(seq, good)                      # every other frame, in order
    keep = (good[:, None] * s + np.arange(s)).ravel()
    np.testing.assert_array_equal(np.concatenate([g.codes for g in got]), codes[keep])
    runs = 1 + int(np.count_nonzero(np.diff(bad) > 1))           # adjacent bad frames: one run
    assert parser.total_crc_errors == bad.size
    assert parser.total_resyncs == runs
    assert parser.total_discarded == bad.size * L
    assert sum(g.crc_errors for g in got) == bad.size


def test_garbage_between_frames_resynchronises_within_one_frame() -> None:
    m, s = 2, 3
    a = encode_data_frames(0, _codes(3 * s, m), 0, s)
    b = encode_data_frames(3, _codes(3 * s, m), 0, s)
    junk = b"\xA5\x5A\x01\x00\x20" + bytes(range(40)) + b"\xA5"   # a false header among it
    parser = FrameParser(m)
    out = parser.feed(a + junk + b)
    assert out.seq.tolist() == [0, 1, 2, 3, 4, 5]
    assert out.resyncs == 1 and out.discarded_bytes == len(junk)


def test_controls_between_data_frames_and_mixed_frame_sizes() -> None:
    m = 2
    a = encode_data_frames(0, _codes(4, m), 0, 2)                 # 2 frames of 2 samples
    ack = encode_frame(FrameType.ACK, 77, bytes((FrameType.START, 0)))
    nak = encode_frame(FrameType.NAK, 78, bytes((FrameType.SHUNT, NakReason.BAD_ARGUMENT)))
    c_codes = _codes(9, m)
    c = encode_data_frames(2, c_codes, 0, 3)                     # 3 frames of 3 samples
    out = FrameParser(m).feed(a + ack + c[:20] + nak + c)
    assert [(f.frame_type, f.seq, f.command) for f in out.controls] == [
        (FrameType.ACK, 77, FrameType.START), (FrameType.NAK, 78, FrameType.SHUNT)]
    assert out.controls[1].reason == NakReason.BAD_ARGUMENT
    assert out.seq.tolist() == [0, 1, 2, 3, 4]
    assert out.samples_per_frame.tolist() == [2, 2, 3, 3, 3]
    assert out.codes.shape == (13, m)
    np.testing.assert_array_equal(out.codes[4:], c_codes)
    assert out.crc_errors == 1                                    # the cut-off frame of c


def test_command_parser_sees_no_data_frames() -> None:
    data = encode_data_frames(0, _codes(4, 2), 0, 2)
    cmd = encode_command(FrameType.START, 9)
    out = FrameParser(None).feed(data + cmd + data)
    assert out.n_frames == 0
    assert [(c.frame_type, c.seq) for c in out.controls] == [(FrameType.START, 9)]


def test_samples_per_frame_restriction() -> None:
    data = encode_data_frames(0, _codes(4, 2), 0, 2) + encode_data_frames(5, _codes(3, 2), 0, 1)
    out = FrameParser(2, samples_per_frame=1).feed(data)
    assert out.seq.tolist() == [5, 6, 7]


@st.composite
def damaged_streams(draw: st.DrawFn):
    m = draw(st.integers(1, 4))
    s = draw(st.integers(1, 3))
    n_frames = draw(st.integers(1, 12))
    seed = draw(st.integers(0, 2**31))
    rng = np.random.default_rng(seed)
    codes = _codes(n_frames * s, m, rng)
    frames = [encode_data_frames(i, codes[i * s:(i + 1) * s], rng.integers(0, 256, m)
                                 .astype(np.uint8), s) for i in range(n_frames)]
    parts: list[bytes] = []
    intact: list[int] = []
    for i, f in enumerate(frames):
        kind = draw(st.sampled_from(["ok", "ok", "garbage", "truncated", "flipped"]))
        if kind == "garbage":
            parts.append(draw(st.binary(max_size=60)))
        if kind == "truncated":
            parts.append(f[:draw(st.integers(0, len(f) - 1))])
            continue
        if kind == "flipped":
            j = draw(st.integers(2, len(f) - 1))
            parts.append(f[:j] + bytes([f[j] ^ draw(st.integers(1, 255))]) + f[j + 1:])
            continue
        parts.append(f)
        intact.append(i)
    if draw(st.booleans()):
        parts.append(draw(st.binary(max_size=40)))
    stream = b"".join(parts)
    cuts = sorted(draw(st.lists(st.integers(0, len(stream)), max_size=8)))
    return m, s, codes, intact, stream, cuts


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(damaged_streams())
def test_damage_never_makes_a_false_sample(case) -> None:
    m, s, codes, intact, stream, cuts = case
    parser = FrameParser(m)
    bounds = [0] + cuts + [len(stream)]
    got = [parser.feed(stream[a:b]) for a, b in zip(bounds[:-1], bounds[1:])]
    seq = np.concatenate([g.seq for g in got]).astype(np.int64)
    out = np.concatenate([g.codes for g in got]).reshape(-1, s, m) if seq.size else None
    # every decoded frame is one that was encoded, with exactly its samples; every intact
    # frame is found (damage costs no more than the damaged frame itself)
    assert seq.tolist() == intact
    for j, i in enumerate(seq.tolist()):
        np.testing.assert_array_equal(out[j], codes[i * s:(i + 1) * s])


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=3000), st.integers(1, 8))
def test_random_bytes_give_no_frames(data: bytes, m: int) -> None:
    parser = FrameParser(m)
    half = len(data) // 2
    out = [parser.feed(data[:half]), parser.feed(data[half:])]
    assert sum(o.n_frames for o in out) == 0
    assert parser.buffered_bytes <= len(data)
