#!/usr/bin/env python3
"""Virtual serial bridge front-end: the simulated 24-bit bridge converter served over a
pseudo-terminal (and optionally a loopback TCP port), in real time, in either protocol.

    python tools/virtual_frontend.py                       # 4 channels, 1000 S/s, frames
    python tools/virtual_frontend.py --protocol lines --rate 200 --channels 2
    python tools/virtual_frontend.py -c config/demo.yaml --device frame2 --link /tmp/vfe

The first line on stdout is the device path to open (the pty's slave, e.g. /dev/pts/5; with
--no-pty the socket URL); with --tcp a line ``socket://127.0.0.1:PORT`` follows. After a
simulated unplug (--vanish-after) the front-end comes back on a new pty and prints
``PATH <path>``; --link keeps a symbolic link pointed at the current pty (removed while
unplugged), the way /dev/serial/by-id names a USB device, so straind's ``port`` option can
name the link and find the device again.

Samples come from `straind.drivers.simulated.BridgeSimulator` (same configuration and seed,
same codes), numbered by the frame counter: frame ``seq`` carries samples seq*s .. seq*s+s-1
(lines: the counter is the sample number). The counter counts every frame the converter
produced since start, streamed or not, so what a reader misses shows as a counter gap.

Frames protocol: streaming starts on START (or at once with --autostart) and stops on STOP;
SET_RATE, SET_GAIN and SHUNT are answered with ACK or NAK. Lines protocol: streams from the
start (unless --wait-start) and takes text commands ``START``, ``STOP``, ``RATE <hz>``,
``GAIN <g>``, ``SHUNT <channel> <0|1>``, answering ``#OK ...`` or ``#ERR ...``.

Fault injection (all deterministic for a given --seed, logged to stderr or --log FILE, one
event per line ending with ``t=<monotonic clock>``, so a test can count exactly):

    --corrupt-fraction F      flip one byte after the header in that fraction of frames
                              (lines: replace one character by '?'); logs ``CORRUPT <seq>``
    --drop-bytes-fraction F   drop each byte with probability F; logs ``DAMAGED <seq>``
    --stall-after S --stall-for S    send nothing for a while (frames are lost: counter gap);
                              logs ``STALL_BEGIN <seq>``, ``STALL_END <seq>``
    --vanish-after S --vanish-for S  close the pty (and TCP port) as if unplugged, then come
                              back on a new one; logs ``VANISH <seq>``, ``RETURN <seq>``
    --fault-clock start       count the fault times from the first START instead of launch
"""

from __future__ import annotations

import argparse
import errno
import fcntl
import os
import select
import signal
import socket
import sys
import termios
import time
import tty
from dataclasses import dataclass, field
from typing import Any, Callable, TextIO

import numpy as np

from straind.drivers.base import ChannelSetup, DeviceSetup
from straind.drivers.framing import (STATUS_MASK, ControlFrame, FrameParser, FrameType, NakReason,
                                     data_frame_bytes, encode_data_frames, encode_frame)
from straind.drivers.serial_lines import encode_lines

GAINS = (1, 2, 4, 8, 16, 32, 64, 128)
#: most bytes held for one reader before new frames are dropped
BACKLOG_LIMIT_BYTES = 1 << 18


# ------------------------------------------------------------------------------------------
# deterministic per-item random numbers (independent of batching)
# ------------------------------------------------------------------------------------------

def _mix64(x: np.ndarray) -> np.ndarray:
    """A 64-bit integer hash (splitmix64 finaliser), vectorised over uint64 arrays."""
    x = x.astype(np.uint64)
    with np.errstate(over="ignore"):
        x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        x = x ^ (x >> np.uint64(31))
    return x


def uniform(seed: int, stream: int, items: np.ndarray) -> np.ndarray:
    """Uniform [0, 1) numbers, one per item number, fixed by (seed, stream, item)."""
    with np.errstate(over="ignore"):
        key = (np.asarray(items, dtype=np.int64).astype(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
               + np.uint64((seed * 1_000_003 + stream * 7919) & 0xFFFFFFFFFFFFFFFF))
    return (_mix64(_mix64(key)) >> np.uint64(11)).astype(np.float64) / float(1 << 53)


# ------------------------------------------------------------------------------------------
# where the samples come from
# ------------------------------------------------------------------------------------------

def default_channel(i: int, microstrain: float) -> dict[str, Any]:
    """A quarter-bridge 350 ohm foil gauge with a shunt resistor, constant strain."""
    return {
        "name": f"ch{i}", "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350.0,
        "bridge": "quarter", "wiring": "3-wire", "lead_ohm": 0.0, "excitation_v": 5.0,
        "shunt": {"ohm": 174650.0, "arm": 1},
        "options": {"truth": {"kind": "constant", "value": float(microstrain)}},
    }


@dataclass
class Source:
    """The simulated converter and what was asked of it."""

    setup: DeviceSetup
    sim_options: dict[str, Any]
    sim: Any = None

    def __post_init__(self) -> None:
        self.rebuild()

    def rebuild(self) -> None:
        from straind.drivers.simulated import BridgeSimulator
        self.sim = BridgeSimulator(self.setup, self.sim_options, self.setup.name)

    @property
    def n_channels(self) -> int:
        return len(self.setup.channels)

    def with_rate(self, rate_hz: float) -> None:
        self.setup = DeviceSetup(self.setup.name, rate_hz, self.setup.block_samples,
                                 self.setup.channels, self.setup.config)
        self.rebuild()

    def with_gain(self, gain: int) -> None:
        config = dict(self.setup.config)
        config["adc"] = {**dict(config.get("adc") or {}), "gain": gain}
        self.setup = DeviceSetup(self.setup.name, self.setup.sample_rate_hz,
                                 self.setup.block_samples, self.setup.channels, config)
        self.rebuild()


def source_from_config(path: str, device: str | None, strains: list[float],
                       seed: int | None) -> Source:
    """The device `device` of a straind configuration file as a simulated source.

    A simulated-bridge device brings its own truth scenarios and noise options; any other
    device (for example the serial-frames device of the configuration the service will run)
    lends its channels, rate and adc section, with constant strains from --strain.
    """
    from straind.config import load_config
    cfg = load_config(path)
    devices = cfg.devices
    if device is None:
        if len(devices) != 1:
            raise SystemExit(f"{path} has {len(devices)} devices: name one with --device")
        dev = devices[0]
    else:
        found = [d for d in devices if d["name"] == device]
        if not found:
            raise SystemExit(f"{path} has no device named {device!r} "
                             f"(devices: {', '.join(d['name'] for d in devices)})")
        dev = found[0]
    simulated = dev["driver"] == "simulated-bridge"
    channels = []
    for i, c in enumerate(dev["channels"]):
        if simulated:
            opts = dict(c.get("options") or {})
        else:
            value = strains[i] if i < len(strains) else (strains[-1] if strains else 0.0)
            opts = {"truth": {"kind": "constant", "value": float(value)}}
        channels.append(ChannelSetup(c["name"], i, c, opts))
    sim_options = dict(dev.get("options") or {}) if simulated else {}
    if seed is not None:
        sim_options["seed"] = seed
    setup = DeviceSetup(dev["name"], float(dev["sample_rate_hz"]), int(dev["block_samples"]),
                        tuple(channels), dev)
    return Source(setup, sim_options)


def source_from_args(channels: int, rate_hz: float, strains: list[float], gain: int,
                     seed: int, noise_nv_per_v: float) -> Source:
    chans = []
    for i in range(channels):
        value = strains[i] if i < len(strains) else (strains[-1] if strains else 100.0 * (i + 1))
        cfg = default_channel(i, value)
        chans.append(ChannelSetup(cfg["name"], i, cfg, cfg["options"]))
    setup = DeviceSetup("virtual", float(rate_hz), max(1, int(rate_hz // 10)), tuple(chans),
                        {"name": "virtual", "adc": {"gain": gain, "reference": "excitation"}})
    return Source(setup, {"seed": seed, "noise_nv_per_v": noise_nv_per_v})


# ------------------------------------------------------------------------------------------
# the readers: a pty and TCP clients
# ------------------------------------------------------------------------------------------

@dataclass
class Reader:
    """One connection to a host: its bytes out, its command parser, its streaming state."""

    name: str
    read_fd: int
    write: Callable[[bytes], int]
    streaming: bool
    parser: FrameParser = field(default_factory=lambda: FrameParser(None))
    text: bytes = b""
    backlog: bytearray = field(default_factory=bytearray)
    overflow_frames: int = 0


class Log:
    def __init__(self, path: str | None):
        self.stream: TextIO = open(path, "a", buffering=1) if path else sys.stderr

    def __call__(self, *words: Any) -> None:
        # the monotonic clock is system-wide, so a test can compare it with its own
        self.stream.write(" ".join(str(w) for w in words) + f" t={time.monotonic():.6f}\n")
        self.stream.flush()


class Pty:
    """A pseudo-terminal whose slave side we keep open, so it survives readers coming and
    going; bytes for a slave nobody reads pile up in our backlog and are then dropped."""

    def __init__(self, link: str | None):
        self.master, self.slave = os.openpty()
        tty.setraw(self.slave, termios.TCSANOW)
        flags = fcntl.fcntl(self.master, fcntl.F_GETFL)
        fcntl.fcntl(self.master, fcntl.F_SETFL, flags | os.O_NONBLOCK)
        self.path = os.ttyname(self.slave)
        self.link = link
        if link:
            tmp = f"{link}.tmp{os.getpid()}"
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
            os.symlink(self.path, tmp)
            os.replace(tmp, link)

    def write(self, data: bytes) -> int:
        try:
            return os.write(self.master, data)
        except BlockingIOError:
            return 0

    def close(self) -> None:
        if self.link:
            try:
                if os.path.islink(self.link) and os.readlink(self.link) == self.path:
                    os.unlink(self.link)
            except OSError:
                pass
        for fd in (self.master, self.slave):
            try:
                os.close(fd)
            except OSError:
                pass


# ------------------------------------------------------------------------------------------
# the front-end
# ------------------------------------------------------------------------------------------

class FrontEnd:
    def __init__(self, source: Source, args: argparse.Namespace, log: Log):
        self.src = source
        self.args = args
        self.log = log
        self.protocol = args.protocol
        self.ns = args.samples_per_frame if self.protocol == "frames" else 1
        self.m = source.n_channels
        if self.protocol == "frames" and data_frame_bytes(self.m, self.ns) > 0xFFFF:
            raise SystemExit("frame too long: use fewer samples per frame")
        self.autostart = args.autostart if args.autostart is not None else self.protocol == "lines"
        self.seq0 = int(args.seq_start)
        self.produced = 0                     # frames produced since start (not wrapped)
        self.t_base = time.monotonic()
        self.produced_base = 0
        self.started_mono = self.t_base
        self.pty: Pty | None = None
        self.listener: socket.socket | None = None
        self.readers: list[Reader] = []
        self.stalled = False
        self.vanished = False
        self.vanish_done = False
        self.byte_counter = 0
        self.tcp_port: int | None = None
        # when the fault schedule starts: at launch, or at the first START (--fault-clock)
        self.fault_zero: float | None = self.t_base if args.fault_clock == "launch" else None

    # -- setup -------------------------------------------------------------------------------
    def open_endpoints(self) -> list[str]:
        paths = []
        if not self.args.no_pty:
            self.pty = Pty(self.args.link)
            self.readers.append(Reader("pty", self.pty.master, self.pty.write, self.autostart))
            paths.append(self.pty.path)
        if self.args.tcp is not None:
            lst = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
            lst.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            lst.bind(("127.0.0.1", self.tcp_port if self.tcp_port is not None else self.args.tcp))
            lst.listen(1)
            lst.setblocking(False)
            self.listener = lst
            self.tcp_port = lst.getsockname()[1]
            paths.append(f"socket://127.0.0.1:{self.tcp_port}")
        return paths

    def close_endpoints(self) -> None:
        for r in list(self.readers):
            if r.name != "pty":
                try:
                    os.close(r.read_fd)
                except OSError:
                    pass
        self.readers.clear()
        if self.pty is not None:
            self.pty.close()
            self.pty = None
        if self.listener is not None:
            self.listener.close()
            self.listener = None

    # -- frames ------------------------------------------------------------------------------
    def seq_of(self, k: int) -> int:
        return self.seq0 + k

    def due_frames(self, now: float) -> int:
        rate = self.src.setup.sample_rate_hz
        return self.produced_base + int((now - self.t_base) * rate / self.ns)

    def produce(self, now: float) -> None:
        due = self.due_frames(now)
        if due <= self.produced:
            return
        rate = self.src.setup.sample_rate_hz
        max_batch = max(1, int(rate / self.ns))        # at most a second at once
        first = self.produced
        if due - first > max_batch:
            first = due - max_batch
        self.produced = due
        k = due - first
        live = [r for r in self.readers if r.streaming]
        seq_first = self.seq_of(first)
        if self.vanished or self.stalled or not live:
            return
        codes, quality = self.src.sim.codes(seq_first * self.ns, k * self.ns)
        if self.protocol == "frames":
            status = np.bitwise_or.reduce(
                (quality & np.uint8(STATUS_MASK)).reshape(k, self.ns, self.m), axis=1)
            data = self.faults_frames(encode_data_frames(seq_first, codes, status, self.ns),
                                      seq_first, k)
        else:
            data = self.faults_lines(codes, seq_first)
        for r in live:
            if len(r.backlog) > BACKLOG_LIMIT_BYTES:
                r.overflow_frames += k
                self.log("OVERFLOW", r.name, seq_first, k)
                continue
            r.backlog += data

    def faults_frames(self, data: bytes, seq_first: int, k: int) -> bytes:
        args = self.args
        if not (args.corrupt_fraction or args.drop_bytes_fraction):
            return data
        L = data_frame_bytes(self.m, self.ns)
        seqs = seq_first + np.arange(k, dtype=np.int64)
        if args.corrupt_fraction:
            arr = np.frombuffer(data, dtype=np.uint8).reshape(k, L).copy()
            hit = np.flatnonzero(uniform(args.seed, 1, seqs) < args.corrupt_fraction)
            if hit.size:
                where = 11 + (uniform(args.seed, 2, seqs[hit]) * (L - 11)).astype(np.int64)
                flip = 1 + (uniform(args.seed, 3, seqs[hit]) * 255).astype(np.int64)
                arr[hit, where] ^= flip.astype(np.uint8)
                for s in seqs[hit].tolist():
                    self.log("CORRUPT", s % (1 << 32))
            data = arr.tobytes()
        if args.drop_bytes_fraction:
            a = np.frombuffer(data, dtype=np.uint8)
            pos = self.byte_counter + np.arange(a.size, dtype=np.int64)
            self.byte_counter += a.size
            drop = uniform(args.seed, 4, pos) < args.drop_bytes_fraction
            if drop.any():
                for s in np.unique(seqs[np.flatnonzero(drop) // L]).tolist():
                    self.log("DAMAGED", s % (1 << 32))
                data = a[~drop].tobytes()
        return data

    def faults_lines(self, codes: np.ndarray, seq_first: int) -> bytes:
        args = self.args
        counter = None if args.no_counter else seq_first
        sep = args.separator
        if not (args.corrupt_fraction or args.drop_bytes_fraction):
            return encode_lines(codes, counter, sep, args.counter_modulo)
        n = codes.shape[0]
        idx = seq_first + np.arange(n, dtype=np.int64)
        lines = encode_lines(codes, counter, sep, args.counter_modulo).split(b"\n")[:-1]
        out = []
        hit = uniform(args.seed, 1, idx) < args.corrupt_fraction if args.corrupt_fraction \
            else np.zeros(n, bool)
        for i, line in enumerate(lines):
            if hit[i]:
                j = int(uniform(args.seed, 2, idx[i:i + 1])[0] * len(line))
                line = line[:j] + b"?" + line[j + 1:]
                self.log("CORRUPT", int(idx[i]) % args.counter_modulo)
            out.append(line + b"\n")
        data = b"".join(out)
        if args.drop_bytes_fraction:
            a = np.frombuffer(data, dtype=np.uint8)
            pos = self.byte_counter + np.arange(a.size, dtype=np.int64)
            self.byte_counter += a.size
            drop = uniform(args.seed, 4, pos) < args.drop_bytes_fraction
            if drop.any():
                ends = np.cumsum([len(x) for x in out])
                for li in np.unique(np.searchsorted(ends, np.flatnonzero(drop), side="right")):
                    self.log("DAMAGED", int(idx[li]) % args.counter_modulo)
                data = a[~drop].tobytes()
        return data

    # -- commands ----------------------------------------------------------------------------
    def next_frame_sample(self) -> int:
        """Sample number of the first sample not yet produced (where a change takes effect)."""
        return self.seq_of(self.produced) * self.ns

    def on_command(self, r: Reader, cf: ControlFrame) -> None:
        t = cf.frame_type
        reason = 0
        if t == FrameType.START:
            if self.fault_zero is None:
                self.fault_zero = time.monotonic()
            if not r.streaming:
                r.backlog.clear()          # a fresh start: nothing stale before the ACK
            r.streaming = True
        elif t == FrameType.STOP:
            r.streaming = False
        elif t == FrameType.SET_RATE:
            rate = int.from_bytes(cf.payload[:4], "big") / 1000.0
            reason = self.set_rate(rate)
        elif t == FrameType.SET_GAIN:
            reason = self.set_gain(cf.payload[0], cf.payload[1])
        elif t == FrameType.SHUNT:
            reason = self.set_shunt(cf.payload[0], bool(cf.payload[1]))
        elif t in (FrameType.ACK, FrameType.NAK):
            return
        else:
            reason = NakReason.UNKNOWN_COMMAND
        name = FrameType(t).name if t in FrameType._value2member_map_ else hex(t)
        self.log("CMD", r.name, name, cf.seq, "ACK" if not reason else f"NAK {reason}",
                 "at", self.seq_of(self.produced))
        answer = FrameType.NAK if reason else FrameType.ACK
        r.backlog += encode_frame(answer, cf.seq, bytes((t, int(reason))))

    def set_rate(self, rate_hz: float) -> int:
        if not 0.1 <= rate_hz <= 100_000:
            return NakReason.BAD_ARGUMENT
        if abs(rate_hz - self.src.setup.sample_rate_hz) > 1e-9 * rate_hz:
            self.produce(time.monotonic())
            self.src.with_rate(rate_hz)
            self.t_base = time.monotonic()
            self.produced_base = self.produced
        return 0

    def set_gain(self, channel: int, gain: int) -> int:
        if gain not in GAINS or (channel != 0xFF and channel >= self.m):
            return NakReason.BAD_ARGUMENT
        current = int((self.src.setup.config.get("adc") or {}).get("gain", 0))
        if gain == current:
            return 0
        if channel != 0xFF and self.m > 1:
            return NakReason.BAD_ARGUMENT     # one PGA setting for all channels here
        self.produce(time.monotonic())
        self.src.with_gain(gain)
        return 0

    def set_shunt(self, channel: int, on: bool) -> int:
        chans = range(self.m) if channel == 0xFF else [channel]
        if channel != 0xFF and channel >= self.m:
            return NakReason.BAD_ARGUMENT
        sim = self.src.sim
        targets = [c for c in chans if sim.has_shunt(self.src.setup.channels[c].index)]
        if not targets:
            return NakReason.BAD_ARGUMENT
        self.produce(time.monotonic())
        start = self.next_frame_sample()
        for c in targets:
            sim.set_shunt(self.src.setup.channels[c].index, on, from_index=start)
        return 0

    def on_text(self, r: Reader, line: str) -> None:
        words = line.strip().split()
        if not words:
            return
        cmd = words[0].upper()
        err = ""
        try:
            if cmd == "START":
                if self.fault_zero is None:
                    self.fault_zero = time.monotonic()
                r.streaming = True
            elif cmd == "STOP":
                r.streaming = False
            elif cmd == "RATE":
                err = "bad rate" if self.set_rate(float(words[1])) else ""
            elif cmd == "GAIN":
                err = "bad gain" if self.set_gain(0xFF, int(words[1])) else ""
            elif cmd == "SHUNT":
                err = "bad channel" if self.set_shunt(int(words[1]), words[2] != "0") else ""
            else:
                err = "unknown command"
        except (IndexError, ValueError):
            err = "bad arguments"
        self.log("CMD", r.name, line.strip(), "ERR " + err if err else "OK")
        reply = f"#ERR {line.strip()}: {err}\n" if err else f"#OK {line.strip()}\n"
        r.backlog += reply.encode("ascii", "replace")

    def read_commands(self, r: Reader) -> bool:
        """Read what the host sent; False when the connection is gone."""
        try:
            data = os.read(r.read_fd, 65536)
        except BlockingIOError:
            return True
        except OSError as exc:
            if exc.errno == errno.EIO:   # pty: no process has the slave open (not an error)
                return True
            return False
        if not data:
            return r.name == "pty"
        if self.protocol == "frames":
            for cf in r.parser.feed(data).controls:
                self.on_command(r, cf)
        else:
            r.text += data
            *lines, r.text = r.text.split(b"\n")
            for line in lines:
                self.on_text(r, line.decode("ascii", "replace"))
        return True

    # -- schedule ----------------------------------------------------------------------------
    def scheduled(self, now: float) -> None:
        a = self.args
        if self.fault_zero is None:
            return
        t = now - self.fault_zero
        if a.stall_after is not None:
            in_stall = a.stall_after <= t < a.stall_after + a.stall_for
            if in_stall != self.stalled:
                self.stalled = in_stall
                self.log("STALL_BEGIN" if in_stall else "STALL_END",
                         self.seq_of(self.produced) % (1 << 32))
        if a.vanish_after is not None and not self.vanish_done:
            if not self.vanished and t >= a.vanish_after:
                self.vanished = True
                self.log("VANISH", self.seq_of(self.produced) % (1 << 32))
                self.close_endpoints()
            elif self.vanished and t >= a.vanish_after + a.vanish_for:
                self.vanished = False
                self.vanish_done = True
                paths = self.open_endpoints()
                self.log("RETURN", self.seq_of(self.produced) % (1 << 32))
                for p in paths:
                    print(f"PATH {p}", flush=True)

    def flush(self) -> None:
        for r in list(self.readers):
            while r.backlog:
                try:
                    n = r.write(bytes(r.backlog[:65536]))
                except OSError:
                    self.drop_reader(r)
                    break
                if n <= 0:
                    break
                del r.backlog[:n]

    def drop_reader(self, r: Reader) -> None:
        if r in self.readers and r.name != "pty":
            self.readers.remove(r)
            try:
                os.close(r.read_fd)
            except OSError:
                pass

    def accept(self) -> None:
        assert self.listener is not None
        try:
            conn, _ = self.listener.accept()
        except BlockingIOError:
            return
        if any(r.name == "tcp" for r in self.readers):
            conn.close()                       # one host at a time, like an exclusive port
            return
        conn.setblocking(False)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        fd = conn.detach()

        def send(data: bytes, fd: int = fd) -> int:
            try:
                return os.write(fd, data)
            except BlockingIOError:
                return 0

        self.readers.append(Reader("tcp", fd, send, self.autostart))

    def run(self, duration_s: float | None, tick_s: float) -> None:
        stop = {"flag": False}

        def on_signal(signum: int, frame: Any) -> None:
            stop["flag"] = True

        signal.signal(signal.SIGTERM, on_signal)
        signal.signal(signal.SIGINT, on_signal)
        end = None if duration_s is None else self.started_mono + duration_s
        period = self.ns / self.src.setup.sample_rate_hz
        try:
            while not stop["flag"]:
                now = time.monotonic()
                if end is not None and now >= end:
                    break
                self.scheduled(now)
                self.produce(now)
                self.flush()
                rfds = [r.read_fd for r in self.readers]
                if self.listener is not None:
                    rfds.append(self.listener.fileno())
                wfds = [r.read_fd for r in self.readers if r.backlog]
                wait = max(0.001, min(tick_s, period))
                try:
                    ready_r, ready_w, _ = select.select(rfds, wfds, [], wait)
                except InterruptedError:
                    continue
                if ready_w:
                    self.flush()
                for fd in ready_r:
                    if self.listener is not None and fd == self.listener.fileno():
                        self.accept()
                        continue
                    for r in list(self.readers):
                        if r.read_fd == fd and not self.read_commands(r):
                            self.drop_reader(r)
                period = self.ns / self.src.setup.sample_rate_hz
        finally:
            self.close_endpoints()


def _floats(text: str) -> list[float]:
    return [float(x) for x in text.split(",") if x.strip()]


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    src = p.add_argument_group("signal")
    src.add_argument("-c", "--config", help="straind configuration file to take the device from")
    src.add_argument("--device", help="device name in the configuration")
    src.add_argument("--channels", type=int, default=4, help="channels (without -c)")
    src.add_argument("--rate", type=float, default=1000.0, help="samples per second (without -c)")
    src.add_argument("--strain", type=_floats, default=[],
                     help="constant microstrain per channel, comma separated (one value: all)")
    src.add_argument("--gain", type=int, default=128, choices=GAINS, help="PGA gain (without -c)")
    src.add_argument("--noise-nv-per-v", type=float, default=20.0, help="noise RMS (without -c)")
    src.add_argument("--seed", type=int, default=None,
                     help="seed of the simulator and of the fault injection (default 0, or "
                          "the configuration's)")
    out = p.add_argument_group("serving")
    out.add_argument("--protocol", choices=("frames", "lines"), default="frames")
    out.add_argument("--samples-per-frame", type=int, default=8)
    out.add_argument("--separator", default=" ", help="lines: field separator (default space)")
    out.add_argument("--no-counter", action="store_true", help="lines: no leading counter")
    out.add_argument("--counter-modulo", type=int, default=1 << 32, help="lines: counter wraps")
    out.add_argument("--seq-start", type=int, default=0,
                     help="frame counter (lines: sample counter) at start, e.g. 4294967000 "
                          "to see it wrap")
    out.add_argument("--tcp", type=int, default=None, metavar="PORT",
                     help="also serve on 127.0.0.1:PORT (0: any free port)")
    out.add_argument("--no-pty", action="store_true", help="TCP only")
    out.add_argument("--link", help="keep this symbolic link pointed at the current pty")
    start = out.add_mutually_exclusive_group()
    start.add_argument("--autostart", dest="autostart", action="store_true", default=None,
                       help="stream without waiting for START (default for lines)")
    start.add_argument("--wait-start", dest="autostart", action="store_false",
                       help="stream only after START (default for frames)")
    out.add_argument("--duration", type=float, default=None, help="exit after this many seconds")
    out.add_argument("--tick-s", type=float, default=0.01, help="longest pause between writes")
    f = p.add_argument_group("faults")
    f.add_argument("--corrupt-fraction", type=float, default=0.0)
    f.add_argument("--drop-bytes-fraction", type=float, default=0.0)
    f.add_argument("--stall-after", type=float, default=None)
    f.add_argument("--stall-for", type=float, default=1.0)
    f.add_argument("--vanish-after", type=float, default=None)
    f.add_argument("--vanish-for", type=float, default=1.0)
    f.add_argument("--fault-clock", choices=("launch", "start"), default="launch",
                   help="count --stall-after/--vanish-after from launch or from the first START")
    f.add_argument("--log", help="fault and command log file (default stderr)")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if args.no_pty and args.tcp is None:
        raise SystemExit("--no-pty needs --tcp")
    if not 1 <= args.samples_per_frame <= 255:
        raise SystemExit("--samples-per-frame must be 1..255")
    if args.config:
        source = source_from_config(args.config, args.device, args.strain, args.seed)
    else:
        source = source_from_args(args.channels, args.rate, args.strain, args.gain,
                                  args.seed or 0, args.noise_nv_per_v)
    if args.seed is None:
        args.seed = int(source.sim_options.get("seed", 0) or 0)
    log = Log(args.log)
    fe = FrontEnd(source, args, log)
    paths = fe.open_endpoints()
    for p in paths:
        print(p, flush=True)
    log("READY", *paths, "channels", fe.m, "rate", source.setup.sample_rate_hz,
        "protocol", args.protocol, "samples_per_frame", fe.ns)
    fe.run(args.duration, args.tick_s)
    return 0


if __name__ == "__main__":
    sys.exit(main())
