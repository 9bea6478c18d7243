#!/usr/bin/env python3
"""Benchmark of the serial frame parser.

1. In memory: the vectorised parser on one encoded stream, fed in reads of several sizes,
   against a plain per-frame Python parser (for the record).
2. Over a pseudo-terminal at the highest rate it sustains: a writer process pushes frames into
   the pty as fast as it can; the reader alternates between raw reads (bytes thrown away) and
   reads that are parsed, over the same port in the same run. Prints both and the ratio.
3. In real time: the virtual front-end serves 32 channels x 2000 samples/s (frames of 8
   samples); the serial-frames driver reads blocks for a while; prints the CPU fraction this
   process used (all of its threads) against wall time.

    python tools/bench_serial.py [--channels 32] [--samples-per-frame 8] [--seconds 3]
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import resource
import subprocess
import sys
import time
import tty
from pathlib import Path

import numpy as np

from straind.drivers.base import ChannelSetup, DeviceSetup
from straind.drivers.framing import (SYNC, FrameParser, crc16_ccitt_false, data_frame_bytes,
                                     encode_data_frames)
from straind.drivers.serial_frames import SerialFrames

TOOLS = Path(__file__).resolve().parent


def naive_parse(buf: bytes, m: int) -> list[tuple[int, list[int]]]:
    """A straightforward per-frame parser: find, check and decode one frame at a time."""
    out = []
    i = 0
    n = len(buf)
    while True:
        j = buf.find(SYNC, i)
        if j < 0 or j + 11 > n:
            break
        length = int.from_bytes(buf[j + 3:j + 5], "big")
        if j + length > n:
            break
        frame = buf[j:j + length]
        if frame[2] != 1 or frame[9] != m or crc16_ccitt_false(frame[2:]) != 0:
            i = j + 1
            continue
        codes = [int.from_bytes(frame[o:o + 3], "big", signed=True)
                 for o in range(11 + m, length - 2, 3)]
        out.append((int.from_bytes(frame[5:9], "big"), codes))
        i = j + length
    return out


def stream(m: int, s: int, frames: int, seed: int = 1) -> bytes:
    rng = np.random.default_rng(seed)
    codes = rng.integers(-(1 << 23), 1 << 23, size=(frames * s, m)).astype(np.int32)
    return encode_data_frames(0, codes, 0, s)


def in_memory(m: int, s: int) -> None:
    frames = 8192
    data = stream(m, s, frames)
    L = data_frame_bytes(m, s)
    print(f"in memory: {frames} frames of {m} channels x {s} samples, {L} bytes each")
    for chunk in (4096, 65536, 1 << 20):
        parser = FrameParser(m)
        t0 = time.perf_counter()
        got = 0
        for i in range(0, len(data), chunk):
            got += parser.feed(data[i:i + chunk]).n_frames
        dt = time.perf_counter() - t0
        assert got == frames
        print(f"  vectorised parser, reads of {chunk:>8} B: {frames / dt:>10.0f} frames/s "
              f"({len(data) / dt / 1e6:7.1f} MB/s)")
    part = data[:L * 1000]
    t0 = time.perf_counter()
    got = len(naive_parse(part, m))
    dt = time.perf_counter() - t0
    assert got == 1000
    print(f"  naive per-frame Python parser:    {got / dt:>10.0f} frames/s "
          f"({len(part) / dt / 1e6:7.1f} MB/s)")


def lines_in_memory(m: int = 16, n: int = 20000) -> None:
    """The vectorised line parser, for the record (16 channels, counter column)."""
    from straind.drivers.serial_lines import LineParser, encode_lines
    rng = np.random.default_rng(2)
    codes = rng.integers(-(1 << 23), 1 << 23, size=(n, m))
    data = encode_lines(codes, 0, ",")
    parser = LineParser(m + 1, None, None, skip_first=False)
    t0 = time.perf_counter()
    got = 0
    for i in range(0, len(data), 32768):
        got += parser.feed(data[i:i + 32768]).values.shape[0]
    dt = time.perf_counter() - t0
    assert got == n
    print(f"  line parser, {m} channels + counter:  {n / dt:>10.0f} lines/s "
          f"({len(data) / dt / 1e6:7.1f} MB/s)")


def _writer(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while True:
        os.write(fd, view)


def over_pty(m: int, s: int, seconds: float) -> None:
    import serial
    L = data_frame_bytes(m, s)
    master, slave = os.openpty()
    tty.setraw(slave)
    path = os.ttyname(slave)
    data = stream(m, s, 2048)          # the writer repeats it: sequence numbers do not matter
    port = serial.serial_for_url(path, timeout=0.05, exclusive=True)
    ctx = mp.get_context("fork")
    writer = ctx.Process(target=_writer, args=(master, data), daemon=True)
    writer.start()
    chunk = 1 << 20
    raw_bytes = raw_s = parsed_frames = parsed_bytes = parse_s = 0.0
    parser = FrameParser(m)
    try:
        port.read(chunk)               # let the writer get going
        for _ in range(2):
            t0 = time.perf_counter()
            while time.perf_counter() - t0 < seconds / 4:
                raw_bytes += len(port.read(chunk))
            raw_s += time.perf_counter() - t0
            parser.reset()             # the raw phase skipped bytes: start afresh
            t0 = time.perf_counter()
            while time.perf_counter() - t0 < seconds / 4:
                got = port.read(chunk)
                parsed_bytes += len(got)
                parsed_frames += parser.feed(got).n_frames
            parse_s += time.perf_counter() - t0
    finally:
        writer.kill()
        writer.join()
        port.close()
        os.close(master)
        os.close(slave)
    raw_fps = raw_bytes / L / raw_s
    parse_fps = parsed_frames / parse_s
    print(f"pseudo-terminal, highest sustained rate ({m} channels x {s} samples per frame):")
    print(f"  raw reads:    {raw_fps:>10.0f} frames/s ({raw_bytes / raw_s / 1e6:7.1f} MB/s)")
    print(f"  parsed reads: {parse_fps:>10.0f} frames/s ({parsed_bytes / parse_s / 1e6:7.1f} MB/s)"
          f", {parser.total_crc_errors} CRC errors")
    print(f"  ratio parsed/raw: {parse_fps / raw_fps:.2f}")


def realtime(m: int, rate_hz: float, s: int, seconds: float) -> None:
    fe = subprocess.Popen([sys.executable, str(TOOLS / "virtual_frontend.py"), "--channels",
                           str(m), "--rate", str(rate_hz), "--samples-per-frame", str(s),
                           "--noise-nv-per-v", "50", "--duration", str(seconds + 10)],
                          stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    path = fe.stdout.readline().strip()
    chans = tuple(ChannelSetup(f"ch{i}", i, {}, {}) for i in range(m))
    setup = DeviceSetup("bench", rate_hz, int(rate_hz // 10), chans, {"adc": {"gain": 128}})
    drv = SerialFrames(setup, {"port": path})
    samples = 0
    try:
        drv.open()
        drv.read_block(1.0)            # settle: the first block after START
        t0, c0 = time.perf_counter(), time.process_time()
        while time.perf_counter() - t0 < seconds:
            b = drv.read_block(0.25)
            if b is not None:
                samples += b.n_samples
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
        counters = dict(drv.counters)
    finally:
        drv.close()
        fe.terminate()
        fe.wait(10)
    child = resource.getrusage(resource.RUSAGE_CHILDREN)
    print(f"real time, {m} channels x {rate_hz:g} samples/s ({m * 3 * rate_hz / 1e3:.0f} kB/s "
          f"of samples, frames of {s}):")
    print(f"  received {samples / wall:.0f} samples/s; CPU used by the reading process: "
          f"{cpu / wall:.3f} of one core")
    print(f"  lost frames {counters.get('lost_frames', 0)}, CRC errors "
          f"{counters.get('crc_errors', 0)}; the front-end process used "
          f"{(child.ru_utime + child.ru_stime):.1f} s CPU in all")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--channels", type=int, default=32)
    p.add_argument("--samples-per-frame", type=int, default=8)
    p.add_argument("--rate", type=float, default=2000.0, help="real-time part: samples/s")
    p.add_argument("--seconds", type=float, default=4.0, help="duration of each timed part")
    p.add_argument("--skip-realtime", action="store_true")
    args = p.parse_args(argv)
    in_memory(args.channels, args.samples_per_frame)
    lines_in_memory()
    over_pty(args.channels, args.samples_per_frame, args.seconds)
    if not args.skip_realtime:
        realtime(args.channels, args.rate, args.samples_per_frame, args.seconds)
    return 0


if __name__ == "__main__":
    sys.exit(main())
