"""Tests of the HDF5 store: real files, real reader processes, real SIGKILLs."""

from __future__ import annotations

import calendar
import errno
import hashlib
import json
import os
import queue
import random
import re
import signal
import subprocess
import sys
import threading
import time
from datetime import datetime, timezone
from pathlib import Path

import h5py
import numpy as np
import pytest

import straind
import straind.store as store_mod
from straind.block import Block, EngineeringBlock, Quality
from straind.events import Event
from straind.layout import ChannelLayout, DeviceLayout
from straind.store import (Store, is_unclosed, lookup3_hashlittle, read_events, recover_unclosed,
                           segment_end_ns)

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
import store_writer_child as gen  # noqa: E402  (deterministic stream shared with the child)

NAME_RE = re.compile(r"^(?P<station>[A-Za-z0-9._-]+)_(?P<ts>\d{8}T\d{6}Z)(?:-(?P<n>\d+))?\.h5$")


# ----------------------------------------------------------------------------- helpers

def utc_ns(*args: int) -> int:
    """UTC calendar time to ns, through the standard library (independent of the store)."""
    return calendar.timegm(datetime(*args, tzinfo=timezone.utc).utctimetuple()) * 10**9


def make_layout(name: str = "bridge", n_raw: int = 3, rate_hz: float = 1000.0,
                raw_dtype: str = "int32", derived: int = 1) -> DeviceLayout:
    chans = tuple(ChannelLayout(f"sg{i}", i, "strain", "µε", True,
                                {"sensor": "strain_gauge", "bridge": "quarter",
                                 "gauge_factor": 2.05 + i / 100, "gauge_ohm": 350.0,
                                 "excitation_v": 5.0, "calibration_version": 3})
                  for i in range(n_raw))
    chans += tuple(ChannelLayout(f"d{j}", n_raw + j, "strain", "µε", False, {"formula": "mean"})
                   for j in range(derived))
    return DeviceLayout(name, "simulated-bridge", rate_hz, raw_dtype, n_raw, chans,
                        {"serial_number": "SN-42", "adc_gain": 128})


class Stream:
    """Deterministic blocks for one device: sample i of column c has known raw/value/quality."""

    def __init__(self, layout: DeviceLayout, t0_ns: int, block_rows: int, salt: int = 0):
        self.layout = layout
        self.t0_ns = t0_ns
        self.block_rows = block_rows
        self.salt = salt
        self.seq = 0
        self.next_index = 0

    def rows(self, first: int, n: int) -> dict[str, np.ndarray]:
        lay = self.layout
        idx = np.arange(first, first + n, dtype=np.int64)[:, None]
        k = len(lay.channels)
        c_raw = np.arange(lay.n_raw)[None, :]
        c_all = np.arange(k)[None, :]
        raw = ((idx * 1103 + c_raw * 7717 + self.salt) % 200_001 - 100_000)
        raw = raw.astype(np.float64) / 8 if lay.raw_dtype == "float64" else raw.astype(np.int32)
        value = (idx * 0.001 + c_all * 10.0 + self.salt).astype(np.float64)
        value[(idx[:, 0] % 97) == 5, 0] = np.nan
        quality = np.where((idx + c_all) % 11 == 0, int(Quality.AFTER_GAP), 0).astype(np.uint8)
        return {"time_ns": self.t0_ns + idx[:, 0] * lay.period_ns, "raw": raw, "value": value,
                "quality": quality}

    def block(self, n: int | None = None) -> EngineeringBlock:
        n = self.block_rows if n is None else n
        first = self.next_index
        r = self.rows(first, n)
        raw = Block(self.layout.name, r["raw"], np.zeros((n, self.layout.n_raw), np.uint8),
                    start_index=first, period_ns=self.layout.period_ns, seq=self.seq,
                    host_mono_ns=10_000 + self.seq, host_wall_ns=int(r["time_ns"][0]) + 7,
                    t0_ns=int(r["time_ns"][0]))
        self.seq += 1
        self.next_index = first + n
        return EngineeringBlock(raw, r["value"], r["quality"], self.layout.names,
                                self.layout.units)


def storage(path: Path, **over) -> dict:
    s = {"path": str(path), "segment_hours": 24, "segment_max_mb": 2048, "flush_interval_s": 0.05,
         "compression": "none", "value_dtype": "float64", "queue_mb": 64,
         "state_file": str(path / "straind-state.json")}
    s.update(over)
    return s


def wait_for(pred, timeout_s: float = 10.0, what: str = "condition"):
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        v = pred()
        if v:
            return v
        time.sleep(0.005)
    raise AssertionError(f"timed out waiting for {what}")


def assert_same(a: np.ndarray, b: np.ndarray) -> None:
    assert a.shape == b.shape and a.dtype == b.dtype, (a.shape, a.dtype, b.shape, b.dtype)
    np.testing.assert_array_equal(a, b)


def h5_files(d: Path) -> list[Path]:
    """Segment files in the order they were written: by start second, then by suffix."""
    def key(p: Path):
        m = NAME_RE.match(p.name)
        return (m["ts"], int(m["n"] or 0)) if m else ("", 0)
    return sorted(d.glob("*.h5"), key=key)



@pytest.fixture
def new_store():
    """Build Stores that are always stopped at teardown (their writer is not a daemon thread)."""
    made: list[Store] = []

    def make(*args, **kwargs) -> Store:
        st = Store(*args, **kwargs)
        made.append(st)
        return st

    yield make
    for st in made:
        st.stop(timeout_s=5)


READER = r"""
import sys, json, hashlib, h5py, numpy as np
path, dev = sys.argv[1], sys.argv[2]
names = ["time_ns", "raw", "value", "quality"]
with h5py.File(path, "r", swmr=True) as f:
    g = f["devices"][dev]
    print(json.dumps({"ready": True}), flush=True)
    for line in sys.stdin:
        for nm in names:
            g[nm].refresh()
        lens = [g[nm].shape[0] for nm in names]
        n = min(lens)
        out = {"n": n, "lens": lens}
        for nm in names:
            out[nm] = hashlib.sha256(np.ascontiguousarray(g[nm][:n]).tobytes()).hexdigest()
        print(json.dumps(out), flush=True)
"""


class LiveReader:
    """A separate process holding the segment open with swmr=True and refreshing on request."""

    def __init__(self, path: str | Path, device: str):
        self.p = subprocess.Popen([sys.executable, "-c", READER, str(path), device],
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        assert json.loads(self.p.stdout.readline()) == {"ready": True}

    def read(self) -> dict:
        self.p.stdin.write("read\n")
        self.p.stdin.flush()
        return json.loads(self.p.stdout.readline())

    def close(self) -> None:
        self.p.stdin.close()
        assert self.p.wait(timeout=10) == 0


def sha(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()


def assert_reader_sees(res: dict, stream: Stream, first: int = 0) -> None:
    exp = stream.rows(first, res["n"])
    exp["value"] = exp["value"].astype(np.float64)
    for nm in ("time_ns", "raw", "value", "quality"):
        assert res[nm] == sha(exp[nm]), nm


# ----------------------------------------------------------------------------- pure parts

def test_lookup3_against_published_vectors_and_hdf5_itself(tmp_path):
    # Jenkins, lookup3.c self-test driver (from memory): hashlittle of "" and of
    # "Four score and seven years ago" with initval 0 and 1.
    assert lookup3_hashlittle(b"") == 0xDEADBEEF
    assert lookup3_hashlittle(b"Four score and seven years ago") == 0x17770551
    assert lookup3_hashlittle(b"Four score and seven years ago", 1) == 0xCD628161
    # HDF5's own superblock checksum of files it wrote (v3 superblock, 8-byte offsets: 44 bytes
    # followed by the checksum), for a few different end-of-file addresses.
    for n in (1, 500, 20_000):
        p = tmp_path / f"x{n}.h5"
        with h5py.File(p, "w", libver="latest") as f:
            f["a"] = np.arange(n)
        head = p.read_bytes()[:48]
        assert head[:8] == b"\x89HDF\r\n\x1a\n" and head[8] == 3 and head[11] == 0
        assert lookup3_hashlittle(head[:44]) == int.from_bytes(head[44:48], "little")


def test_segment_boundaries_against_calendar():
    # boundaries: UTC midnight and every segment_hours after it within the day
    assert segment_end_ns(utc_ns(2024, 3, 1, 23, 30), 5) == utc_ns(2024, 3, 2)
    assert segment_end_ns(utc_ns(2024, 3, 1, 4, 0), 5) == utc_ns(2024, 3, 1, 5)
    assert segment_end_ns(utc_ns(2024, 3, 1, 10, 0), 5) == utc_ns(2024, 3, 1, 15)
    assert segment_end_ns(utc_ns(2024, 3, 1, 10, 0) - 1, 5) == utc_ns(2024, 3, 1, 10)
    assert segment_end_ns(utc_ns(2024, 2, 29, 0, 0, 1), 24) == utc_ns(2024, 3, 1)
    assert segment_end_ns(utc_ns(2024, 12, 31, 23, 59, 59), 6) == utc_ns(2025, 1, 1)
    assert segment_end_ns(utc_ns(2024, 3, 1, 0, 20), 0.5) == utc_ns(2024, 3, 1, 0, 30)
    # longer than a day: multiples of the period since 1970-01-01 (a Thursday) -> weekly = Thursday
    end = segment_end_ns(utc_ns(2024, 3, 5, 12), 168)
    assert end == utc_ns(2024, 3, 7)


def test_event_rows_lossless_for_long_texts(tmp_path):
    long_detail = {"text": "ε" * 3000, "n": list(range(300))}
    events = [Event(5, "mark", "d" * 150, "kanal-µ" * 20, long_detail, "control-socket"),
              Event(6, "tare", "bridge", "sg0", {"zero_ratio": 1.25e-6}, "service"),
              Event(7, "k" * 33, "", "", {}, "startup")]
    rows = np.concatenate([store_mod._encode_event(e) for e in events])
    assert rows["parts"][0] > 1 and rows.dtype == store_mod.EVENT_DTYPE
    with h5py.File(tmp_path / "e.h5", "w") as f:
        f["events"] = rows
        back = read_events(f)
    assert [e.as_dict() for e in back] == [e.as_dict() for e in events]


# ----------------------------------------------------------------------------- round trip

def test_round_trip_with_live_swmr_reader(tmp_path, new_store):
    a_lay = make_layout("bridge", n_raw=3, derived=1)
    b_lay = make_layout("front", n_raw=2, rate_hz=200.0, raw_dtype="float64", derived=0)
    config_text = "station: {id: lab-7}\n# gauge µε\n"
    seen: list[Event] = []
    st = new_store(storage(tmp_path), "lab-7", config_text, [a_lay, b_lay], on_event=seen.append)
    a = Stream(a_lay, utc_ns(2024, 5, 6, 7, 8, 9) + 123_456, 100)
    b = Stream(b_lay, utc_ns(2024, 5, 6, 7, 8, 9) + 5, 20, salt=3)
    recorded = [Event(utc_ns(2024, 5, 6, 7, 8, 9), "config_load", "", "", {"path": "x.yaml"},
                      "startup")]
    st.record_event(recorded[0])
    st.start()
    for _ in range(20):
        assert st.submit(a.block())
    for _ in range(10):
        assert st.submit(b.block())
    wait_for(lambda: st.status()["flushed_rows"].get("bridge") == 2000
             and st.status()["flushed_rows"].get("front") == 200, what="first flush")
    path = st.status()["segment_path"]
    assert Path(path).name == "lab-7_20240506T070809Z.h5"
    reader = LiveReader(path, "bridge")
    try:
        first = reader.read()
        assert first["n"] == 2000
        assert_reader_sees(first, a)
        for _ in range(15):
            assert st.submit(a.block(37))
        ev = Event(utc_ns(2024, 5, 6, 7, 8, 20), "tare", "bridge", "sg1",
                   {"zero_ratio": -3.5e-7, "note": "x" * 2500}, "control-socket")
        st.record_event(ev)
        recorded.append(ev)
        wait_for(lambda: st.status()["flushed_rows"]["bridge"] == 2000 + 15 * 37,
                 what="second flush")
        second = reader.read()
        assert second["n"] == 2555
        assert_reader_sees(second, a)
    finally:
        reader.close()
    st.stop()
    st.stop()                                   # idempotent
    assert not st.status()["running"] and seen == []
    assert not is_unclosed(path)

    with h5py.File(path, "r") as f:
        assert f.attrs["format_version"] == straind.FORMAT_VERSION
        assert f.attrs["straind_version"] == straind.__version__
        assert f.attrs["station_id"] == "lab-7"
        assert f.attrs["start_reason"] == "start"
        assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z", f.attrs["created_utc"])
        assert f.attrs["host"]
        assert f["config"][()].decode("utf-8") == config_text
        for lay, s in ((a_lay, a), (b_lay, b)):
            g = f["devices"][lay.name]
            exp = s.rows(0, s.next_index)
            for nm in ("time_ns", "raw", "value", "quality"):
                assert_same(g[nm][...], exp[nm])
            assert g.attrs["driver"] == "simulated-bridge"
            assert g.attrs["sample_rate_hz"] == lay.sample_rate_hz
            assert g.attrs["period_ns"] == lay.period_ns
            assert g.attrs["serial_number"] == "SN-42" and g.attrs["adc_gain"] == 128
            assert list(g.attrs["columns"]) == list(lay.names)
            blocks = g["blocks"][...]
            assert len(blocks) == s.seq
            assert list(blocks["seq"]) == list(range(s.seq))
            assert blocks["row"][0] == 0
            np.testing.assert_array_equal(np.diff(blocks["row"]), blocks["n"][:-1])
            np.testing.assert_array_equal(blocks["start_index"], blocks["row"])
            np.testing.assert_array_equal(blocks["t0_ns"], exp["time_ns"][blocks["row"]])
            np.testing.assert_array_equal(blocks["host_mono_ns"], 10_000 + np.arange(s.seq))
            for c in lay.channels:
                ca = f["devices"][lay.name]["channels"][c.name].attrs
                assert ca["column"] == c.column and ca["unit"] == "µε"
                assert ca["quantity"] == "strain" and bool(ca["measured"]) == c.measured
                for key, val in c.attrs.items():
                    assert ca[key] == val
        assert [e.as_dict() for e in read_events(f)] == [e.as_dict() for e in recorded]


def test_float32_values_and_compression(tmp_path, new_store):
    for comp in ("gzip", "lzf"):
        d = tmp_path / comp
        lay = make_layout("b", n_raw=4)
        fl = make_layout("f", n_raw=2, raw_dtype="float64", derived=0)
        st = new_store(storage(d, compression=comp, value_dtype="float32"), "s", "", [lay, fl])
        s1, s2 = Stream(lay, utc_ns(2024, 1, 1), 250), Stream(fl, utc_ns(2024, 1, 1), 50)
        st.start()
        for _ in range(12):
            assert st.submit(s1.block()) and st.submit(s2.block())
        st.stop()
        (p,) = h5_files(d)
        with h5py.File(p, "r") as f:
            for s in (s1, s2):
                g = f["devices"][s.layout.name]
                exp = s.rows(0, s.next_index)
                assert_same(g["raw"][...], exp["raw"])
                assert_same(g["time_ns"][...], exp["time_ns"])
                assert_same(g["quality"][...], exp["quality"])
                assert_same(g["value"][...], exp["value"].astype(np.float32))
                for nm in ("raw", "time_ns", "quality"):
                    assert g[nm].compression == comp and g[nm].shuffle
                assert g["value"].compression is None
                assert g["raw"].chunks[0] >= 1024


# ----------------------------------------------------------------------------- writer behaviour

def test_coalescing_and_flush_on_the_timer(tmp_path, monkeypatch, new_store):
    appends: list[str] = []
    real = store_mod._append_rows

    def counting(ds, start, arr):
        appends.append(ds.name)
        real(ds, start, arr)

    monkeypatch.setattr(store_mod, "_append_rows", counting)
    lay = make_layout("b", n_raw=2)
    s = Stream(lay, utc_ns(2024, 7, 1), 3)
    st = new_store(storage(tmp_path, flush_interval_s=0.2), "s", "", [lay])
    for _ in range(400):                        # queued before the writer runs: one batch
        assert st.submit(s.block())
    st.start()
    wait_for(lambda: st.status()["flush_count"] == 1, what="first flush")
    assert appends.count("/devices/b/time_ns") == 1 and appends.count("/devices/b/raw") == 1
    assert st.status()["flushed_rows"]["b"] == 1200
    reader = LiveReader(st.status()["segment_path"], "b")
    try:
        r1 = reader.read()
        assert r1["n"] == 1200
        assert_reader_sees(r1, s)
        time.sleep(0.7)                         # more than three intervals without new data
        assert st.status()["flush_count"] == 1  # nothing to flush -> no flush
        assert st.submit(s.block(150))
        r2 = reader.read()                      # before or after the next tick, never between
        assert r2["n"] in (1200, 1350)
        wait_for(lambda: st.status()["flush_count"] == 2, what="second flush")
        r3 = reader.read()
        assert r3["n"] == 1350 and r3["lens"] == [1350] * 4
        assert_reader_sees(r3, s)
    finally:
        reader.close()
    st.stop()
    assert st.status()["flush_count"] == 2      # one flush per tick with data, none per block
    with h5py.File(h5_files(tmp_path)[0], "r") as f:
        assert len(f["devices/b/blocks"]) == 401
        assert_same(f["devices/b/raw"][...], s.rows(0, 1350)["raw"])


def test_rotation_at_time_boundary_splits_the_block(tmp_path, new_store):
    lay = make_layout("b", n_raw=2, rate_hz=100.0)            # 10 ms period
    t0 = utc_ns(2024, 3, 1, 0, 59, 58) + 250_000_000
    boundary = utc_ns(2024, 3, 1, 1, 0, 0)
    s = Stream(lay, t0, 50)                                   # 0.5 s blocks
    clock = [utc_ns(2024, 3, 1, 0, 59, 59)]
    st = new_store(storage(tmp_path, segment_hours=1), "rig-1", "cfg", [lay],
               wall_clock_ns=lambda: clock[0])
    st.start()
    for _ in range(8):
        assert st.submit(s.block())
    st.stop()
    names = [p.name for p in h5_files(tmp_path)]
    assert names == ["rig-1_20240301T005958Z.h5", "rig-1_20240301T010000Z.h5"]
    exp = s.rows(0, 400)
    k = int(np.searchsorted(exp["time_ns"], boundary))         # first sample at/after 01:00
    assert k == 175
    with h5py.File(tmp_path / names[0], "r") as f1, h5py.File(tmp_path / names[1], "r") as f2:
        g1, g2 = f1["devices/b"], f2["devices/b"]
        assert_same(g1["time_ns"][...], exp["time_ns"][:k])
        assert_same(g2["time_ns"][...], exp["time_ns"][k:])
        assert g2["time_ns"][0] == boundary
        for nm in ("raw", "value", "quality"):
            assert_same(np.concatenate([g1[nm][...], g2[nm][...]]), exp[nm])
        b1, b2 = g1["blocks"][...], g2["blocks"][...]
        assert list(b1["seq"]) == [0, 1, 2, 3] and list(b2["seq"]) == [3, 4, 5, 6, 7]
        assert b1["n"][-1] == 25 and b2["n"][0] == 25
        assert b2["start_index"][0] == 175 and b2["t0_ns"][0] == boundary and b2["row"][0] == 0
        assert f2.attrs["start_reason"] == "time" and f2.attrs["previous_segment"] == names[0]
        assert f1.attrs["segment_end_utc"] == "2024-03-01T01:00:00.000000Z"
        assert f1.attrs["created_utc"] == "2024-03-01T00:59:59.000000Z"


def test_rotation_by_size_cap(tmp_path, new_store):
    lay = make_layout("b", n_raw=8, derived=0, rate_hz=1000.0)
    row_bytes = 8 + 8 * 4 + 8 * 9
    cap_mb = 0.4
    s = Stream(lay, utc_ns(2024, 8, 9, 10, 11, 12), 500)
    st = new_store(storage(tmp_path, segment_max_mb=cap_mb), "s", "", [lay])
    st.start()
    for _ in range(60):
        assert st.submit(s.block())
    st.stop()
    files = h5_files(tmp_path)
    assert len(files) >= 5
    assert st.status()["segments_written"] == len(files)
    parts = {nm: [] for nm in ("time_ns", "raw", "value", "quality")}
    for i, p in enumerate(files):
        m = NAME_RE.match(p.name)
        with h5py.File(p, "r") as f:
            g = f["devices/b"]
            first = datetime.fromtimestamp(g["time_ns"][0] // 10**9, timezone.utc)
            assert m["ts"] == first.strftime("%Y%m%dT%H%M%SZ")
            assert f.attrs["start_reason"] == ("start" if i == 0 else "size")
            # approximate cap: data within the cap; the file may exceed it by about one chunk
            # (1024 rows) per dataset
            assert g["time_ns"].shape[0] * row_bytes <= cap_mb * 1e6
            assert p.stat().st_size <= cap_mb * 1e6 + 1024 * row_bytes + 64_000
            for nm in parts:
                parts[nm].append(g[nm][...])
    exp = s.rows(0, 30_000)
    for nm, arrs in parts.items():
        assert_same(np.concatenate(arrs), exp[nm])


def test_new_segment_and_every_start_is_a_new_file(tmp_path, new_store):
    lay = make_layout("b", n_raw=2, derived=0)
    lay2 = make_layout("b", n_raw=2, derived=1)               # a derived channel added
    t0 = utc_ns(2024, 9, 1, 12)
    s = Stream(lay, t0, 100)
    st = new_store(storage(tmp_path), "s", "old config", [lay])
    st.start()
    for _ in range(3):
        assert st.submit(s.block())
    st.new_segment([lay2], "new config")
    assert not st.submit(s.block())                           # old shape no longer accepted
    s2 = Stream(lay2, t0 + 400 * lay.period_ns, 100)
    s2.next_index, s2.seq = 400, 4
    for _ in range(2):
        assert st.submit(s2.block())
    st.stop()
    first, second = h5_files(tmp_path)
    with h5py.File(first, "r") as f1, h5py.File(second, "r") as f2:
        assert f1["config"][()] == b"old config" and f2["config"][()] == b"new config"
        assert f1["devices/b/value"].shape == (300, 2) and f2["devices/b/value"].shape == (200, 3)
        assert f2.attrs["start_reason"] == "new_segment"
        assert list(f2["devices/b/channels"]) == ["d0", "sg0", "sg1"]
        assert_same(f2["devices/b/raw"][...], s2.rows(400, 200)["raw"])
    assert first.name == "s_20240901T120000Z.h5"
    assert second.name == "s_20240901T120000Z-1.h5"           # same second: suffix
    before = first.read_bytes()
    # a new Store on the same directory with the same block times: never appends to old files
    again = Stream(lay, t0, 100)
    st2 = new_store(storage(tmp_path), "s", "old config", [lay])
    st2.start()
    assert st2.submit(again.block())
    st2.stop()
    assert [p.name for p in h5_files(tmp_path)] == [
        "s_20240901T120000Z.h5", "s_20240901T120000Z-1.h5", "s_20240901T120000Z-2.h5"]
    assert first.read_bytes() == before


def test_queue_full_drops_are_counted_and_reported(tmp_path, new_store):
    lay = make_layout("b", n_raw=3, derived=1)
    s = Stream(lay, utc_ns(2024, 2, 2), 100)
    one = s.block()
    mem = (one.raw.data.nbytes + one.raw.quality.nbytes + one.values.nbytes
           + one.quality.nbytes + 64)
    s = Stream(lay, utc_ns(2024, 2, 2), 100)
    seen: list[Event] = []
    st = new_store(storage(tmp_path, queue_mb=8.5 * mem / 1e6), "s", "", [lay],
                   on_event=seen.append)
    results = [st.submit(s.block()) for _ in range(20)]        # the writer is not running yet
    assert results == [True] * 8 + [False] * 12
    status = st.status()
    assert status["dropped_blocks"] == 12 and status["dropped_rows"] == 1200
    assert status["queue_blocks"] == 8 and status["queue_bytes"] == 8 * mem
    assert [(e.kind, e.detail["run"], e.detail["seq"]) for e in seen] == [
        ("storage_drop", "begin", 8)]
    st.start()
    wait_for(lambda: st.status()["queue_blocks"] == 0, what="queue drained")
    assert st.submit(s.block())                                # accepted again: run summary
    assert seen[-1].kind == "storage_drop" and seen[-1].detail["run"] == "end"
    assert seen[-1].detail["blocks"] == 12 and seen[-1].detail["rows"] == 1200
    assert (seen[-1].detail["first_seq"], seen[-1].detail["last_seq"]) == (8, 19)
    st.record_event(seen[-1])                                  # handed back: not stored twice
    st.stop()
    assert not st.submit(s.block())                            # after stop
    with h5py.File(h5_files(tmp_path)[0], "r") as f:
        assert list(f["devices/b/blocks"]["seq"]) == list(range(8)) + [20]
        evs = read_events(f)
        assert [(e.kind, e.detail["run"]) for e in evs] == [("storage_drop", "begin"),
                                                            ("storage_drop", "end")]


def test_rejects_blocks_that_do_not_fit_the_layout(tmp_path, new_store):
    lay = make_layout("b", n_raw=2, derived=0)
    st = new_store(storage(tmp_path), "s", "", [lay])
    good = Stream(lay, utc_ns(2024, 1, 1), 10).block()
    other = Stream(make_layout("zz", n_raw=2, derived=0), utc_ns(2024, 1, 1), 10).block()
    wide = Stream(make_layout("b", n_raw=3, derived=0), utc_ns(2024, 1, 1), 10).block()
    untimed = EngineeringBlock(Block("b", good.raw.data, good.raw.quality, 0, 1_000_000, 0, 0, 0),
                               good.values, good.quality, good.names, good.units)
    assert [st.submit(x) for x in (other, wide, untimed, good)] == [False, False, False, True]
    assert st.status()["dropped_blocks"] == 3
    with pytest.raises(ValueError):
        new_store(storage(tmp_path), "s", "", [make_layout("a/b")])
    with pytest.raises(ValueError):
        new_store(storage(tmp_path, compression="zstd"), "s", "", [lay])


class FailNext:
    """Make the next `left` appends to `quality` datasets raise an OSError (ENOSPC as a full disk
    would, EIO as a failing disk would).

    raw and value of the same append have been extended and written by then, so the store must
    cut them back.
    """

    MESSAGES = {errno.ENOSPC: "No space left on device (injected)",
                errno.EIO: "Input/output error (injected)"}

    def __init__(self, real, err=errno.ENOSPC):
        self.real = real
        self.err = err
        self.left = 0
        self.raised = 0

    def __call__(self, ds, start, arr):
        if self.left > 0 and ds.name.endswith("/quality"):
            self.left -= 1
            self.raised += 1
            raise OSError(self.err, self.MESSAGES[self.err])
        return self.real(ds, start, arr)


# a full disk never gives the file up (it waits for space); three failures in a row of another
# kind (EIO) give the segment up and continue in a new file
@pytest.mark.parametrize("failures, files, err", [(2, 1, errno.ENOSPC), (3, 1, errno.ENOSPC),
                                                  (3, 2, errno.EIO)])
def test_write_errors_keep_the_thread_and_the_data(tmp_path, monkeypatch, failures, files, err,
                                                   new_store):
    fail = FailNext(store_mod._append_rows, err)
    monkeypatch.setattr(store_mod, "_append_rows", fail)
    lay = make_layout("b", n_raw=2)
    s = Stream(lay, utc_ns(2024, 4, 4, 4), 100)
    seen: list[Event] = []
    st = new_store(storage(tmp_path, flush_interval_s=0.03), "s", "", [lay], on_event=seen.append)
    st.start()
    for _ in range(5):
        assert st.submit(s.block())
    wait_for(lambda: st.status()["flushed_rows"].get("b") == 500, what="healthy flush")
    fail.left = failures
    for _ in range(5):
        assert st.submit(s.block())
    wait_for(lambda: fail.raised == failures, what="injected failures")
    assert st._thread.is_alive()
    wait_for(lambda: not st.status()["faulted"] and st.status()["rows_total"]["b"] == 1000,
             what="recovery")
    status = st.status()
    assert status["write_errors"] == failures
    assert FailNext.MESSAGES[err].split(" (")[0] in status["last_error"]
    faults = [e for e in seen if e.kind == "storage_fault"]
    assert len(faults) == 1 and faults[0].detail["errno"] == err
    assert seen[-1].kind == "storage_recovered" and seen[-1].detail["write_errors"] == failures
    for _ in range(5):
        assert st.submit(s.block())
    st.stop()
    paths = h5_files(tmp_path)
    assert len(paths) == files and not any(is_unclosed(p) for p in paths)
    parts = {nm: [] for nm in ("time_ns", "raw", "value", "quality")}
    kinds = []
    for p in paths:
        with h5py.File(p, "r") as f:
            g = f["devices/b"]
            lens = {g[nm].shape[0] for nm in parts}
            assert len(lens) == 1                            # no partial rows anywhere
            for nm in parts:
                parts[nm].append(g[nm][...])
            kinds += [e.kind for e in read_events(f)]
            if p != paths[0]:
                assert f.attrs["start_reason"] == "write_error"
    exp = s.rows(0, 1500)
    for nm, arrs in parts.items():
        assert_same(np.concatenate(arrs), exp[nm])
    assert kinds == ["storage_fault", "storage_recovered"]


# ----------------------------------------------------------------------------- crash safety

def test_recover_leaves_a_live_writer_alone(tmp_path, new_store):
    lay = make_layout("b", n_raw=2)
    s = Stream(lay, utc_ns(2024, 6, 6), 100)
    st = new_store(storage(tmp_path), "s", "", [lay])
    st.start()
    assert st.submit(s.block())
    wait_for(lambda: st.status()["flush_count"] >= 1, what="flush")
    path = Path(st.status()["segment_path"])
    assert is_unclosed(path)                        # open for writing right now
    before = path.read_bytes()[:48]
    assert recover_unclosed(tmp_path) == []
    other = subprocess.run([sys.executable, "-c", "import sys; from straind.store import "
                            "recover_unclosed; print(len(recover_unclosed(sys.argv[1])))",
                            str(tmp_path)], capture_output=True, text=True, check=True)
    assert other.stdout.strip() == "0"          # another process leaves it alone too
    assert path.read_bytes()[:48] == before
    assert st.submit(s.block())
    st.stop()
    assert not is_unclosed(path)
    assert recover_unclosed(tmp_path) == []
    with h5py.File(path, "r") as f:
        assert f["devices/b/time_ns"].shape == (200,)
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"not hdf5 at all" * 10)
    assert not is_unclosed(junk) and recover_unclosed(tmp_path) == []


class ForkServer:
    """tests/store_writer_child.py as a fork server; lines of its children arrive in a queue."""

    def __init__(self):
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        self.p = subprocess.Popen([sys.executable, str(HERE / "store_writer_child.py")],
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                                  env=env, cwd=str(HERE))
        self.lines: queue.Queue[str] = queue.Queue()
        threading.Thread(target=self._pump, daemon=True).start()
        assert self.get() == "ready"

    def _pump(self):
        for line in self.p.stdout:
            self.lines.put(line.rstrip("\n"))

    def get(self) -> str:
        return self.lines.get(timeout=15)

    def send(self, text: str) -> None:
        self.p.stdin.write(text + "\n")
        self.p.stdin.flush()

    def close(self) -> None:
        try:
            self.send("quit")
            self.p.wait(timeout=10)
        finally:
            if self.p.poll() is None:
                self.p.kill()
                self.p.wait()


def test_sigkill_at_random_moments_loses_at_most_the_last_interval(tmp_path):
    rng = random.Random(0x5EED)
    server = ForkServer()
    kills_after_flush = 0
    try:
        for i in range(20):
            d = tmp_path / f"run{i}"
            server.send(f"run {d}")
            word, pid = server.get().split()
            assert word == "pid"
            pid = int(pid)
            # a few kills right at start-up, the rest anywhere in the first 0.3 s of writing
            time.sleep(rng.uniform(0.0, 0.01) if i % 7 == 0 else rng.uniform(0.02, 0.3))
            os.kill(pid, signal.SIGKILL)
            flushed = submitted = 0
            while True:
                line = server.get()
                w = line.split()
                if w[0] == "exit":
                    assert int(w[1]) == pid
                    assert os.WIFSIGNALED(int(w[2])) and os.WTERMSIG(int(w[2])) == signal.SIGKILL
                    break
                if w[0] == "flushed":
                    flushed = int(w[1])
                elif w[0] == "submitting":
                    submitted = int(w[1])
                else:
                    raise AssertionError(f"child said {line!r}")
            files = h5_files(d) if d.exists() else []
            if flushed == 0 and not files:
                continue                                     # killed before the file existed
            assert len(files) == 1, files
            (p,) = files
            assert is_unclosed(p)
            with pytest.raises(OSError):
                h5py.File(p, "r").close()                     # refused until recovered
            assert recover_unclosed(d) == [p]
            assert not is_unclosed(p) and recover_unclosed(d) == []
            with h5py.File(p, "r") as f:                      # plain read-only open
                g = f["devices"][gen.DEVICE]
                lens = [g[nm].shape[0] for nm in ("time_ns", "raw", "value", "quality")]
                n_max = max(lens)
                assert flushed <= min(lens) and n_max <= submitted, (flushed, lens, submitted)
                exp = gen.expected(0, n_max)
                for nm in ("time_ns", "raw", "value", "quality"):
                    assert_same(g[nm][...], exp[nm][:g[nm].shape[0]])
                blocks = g["blocks"][...]
                assert len(blocks) * gen.BLOCK_ROWS <= n_max
                assert len(blocks) * gen.BLOCK_ROWS >= flushed
                assert list(blocks["seq"]) == list(range(len(blocks)))
                assert list(blocks["row"]) == list(range(0, len(blocks) * gen.BLOCK_ROWS,
                                                         gen.BLOCK_ROWS))
                marks = [e.detail["seq"] for e in read_events(f)]
                assert marks == list(range(0, gen.MARK_EVERY * len(marks), gen.MARK_EVERY))
                assert f.attrs["format_version"] == straind.FORMAT_VERSION
            if flushed > 0:
                kills_after_flush += 1
    finally:
        server.close()
    assert kills_after_flush >= 10
