#!/usr/bin/env python3
"""Accelerated soak run: weeks of acquisition in minutes, watching memory and file descriptors.

The whole service runs in this process (devices, chain, HDF5 store, upkeep) with the simulated
bridge delivering blocks as fast as they are asked for (`realtime: false`). Sample times come
from the sample clock, so a week of sample time passes in minutes and the daily segments rotate
exactly as they would in a real week. Every `--sample-every-s` the resident memory (VmRSS from
/proc/self/status, after glibc's malloc_trim so it follows live memory rather than the
high-water mark of the store's queue, which a run this fast fills much more than a real one)
and the number of open file descriptors (/proc/self/fd) are sampled, with the store's queue.

Default: a week at 16 channels x 10 samples/s (6 048 000 samples per channel) in blocks of one
second; `--block-samples 1` runs the 6 048 000 blocks a real week at 10 S/s goes through
(the service's default block is a tenth of a second), about ten times slower.

    python tools/soak.py                       # the full week (several minutes)
    python tools/soak.py --days 0.25 --segment-hours 1 --json   # a quick check

Prints the figures (or one JSON document with --json) and exits 1 when RSS grew by more than
--max-rss-growth-mb after the warm-up (RSS less the store's queued bytes, median of the last
third of the samples against the first third), the median fd count grew by more than
--max-fd-change, blocks were dropped, rows went missing, or a segment's times are not strictly
periodic.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
import yaml


def trim_heap() -> None:
    """Give freed heap memory back to the kernel (glibc malloc_trim) before RSS is read, so RSS
    follows live memory rather than the high-water mark of the store's queue."""
    from straind.memory import glibc
    libc = glibc()
    if libc is not None:
        libc.malloc_trim(0)


def rss_kb() -> int:
    """Resident set size of this process (kB), from /proc/self/status."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def open_fds() -> int:
    """Open file descriptors of this process."""
    return len(os.listdir("/proc/self/fd"))


def soak_config(directory: Path, channels: int, rate_hz: float, block_samples: int,
                segment_hours: float) -> str:
    chans = [{"name": f"g{i:02d}", "sensor": "strain_gauge", "gauge_factor": 2.0,
              "gauge_ohm": 350, "bridge": "quarter", "excitation_v": 5.0,
              "options": {"truth": {"kind": "sine", "offset": 100.0 * i, "amplitude": 50.0,
                                    "frequency_hz": 0.001}}} for i in range(channels)]
    doc = {
        "station": {"id": "soak"},
        "storage": {"path": str(directory / "data"), "segment_hours": segment_hours,
                    "flush_interval_s": 1.0, "low_space_mb": 0},
        "control": {"socket": str(directory / "straind.sock")},
        "clock": {"sync_check": "none"},
        "devices": [{"name": "rig", "driver": "simulated-bridge", "sample_rate_hz": rate_hz,
                     "block_samples": block_samples, "adc": {"gain": 128},
                     "options": {"seed": 3, "realtime": False, "noise_nv_per_v": 20},
                     "channels": chans}],
    }
    return yaml.safe_dump(doc, sort_keys=False)


def check_segments(data_dir: Path, period_ns: int) -> dict:
    """Rows per segment, and whether every segment's times step by exactly one period."""
    out = []
    total = 0
    periodic = True
    for p in sorted(data_dir.glob("*.h5")):
        with h5py.File(p, "r") as f:
            t = f["devices/rig/time_ns"][:]
            n = int(t.shape[0])
            ok = bool(n < 2 or np.all(np.diff(t) == period_ns))
            periodic &= ok
            total += n
            out.append({"file": p.name, "rows": n, "periodic": ok,
                        "start_reason": str(f.attrs["start_reason"])})
    return {"segments": out, "rows": total, "periodic": periodic}


def run(args: argparse.Namespace) -> dict:
    from straind.config import load_config_text
    from straind.logs import setup_logging
    from straind.service import Service

    setup_logging(args.log_level)
    work = Path(args.dir) if args.dir else Path(tempfile.mkdtemp(prefix="straind-soak-"))
    work.mkdir(parents=True, exist_ok=True)
    block = args.block_samples or max(1, int(round(args.rate / 10)))
    text = soak_config(work, args.channels, args.rate, block, args.segment_hours)
    cfg = load_config_text(text, str(work / "soak.yaml"), work)
    target = int(round(args.days * 86400 * args.rate))
    svc = Service(cfg)
    t_start = time.monotonic()
    svc.start()
    samples: list[dict] = []
    warm_rss = None
    next_sample = 0.0
    try:
        while True:
            r = svc.runners[0]
            done = r.samples
            now = time.monotonic()
            if now >= next_sample or done >= target:
                next_sample = now + args.sample_every_s
                trim_heap()
                queued = svc.store.status()["queue_bytes"] if svc.store else 0
                samples.append({"t_s": round(now - t_start, 2), "samples": done,
                                "rss_kb": rss_kb(), "fds": open_fds(),
                                "store_queue_kb": queued // 1024})
                if warm_rss is None and done >= target * args.warmup:
                    warm_rss = samples[-1]
            if done >= target:
                break
            svc.upkeep.tick()
            time.sleep(0.05)
    finally:
        ok_stop = svc.stop("soak finished", timeout_s=60)
    elapsed = time.monotonic() - t_start
    store = svc.store.status() if svc.store else {}
    period_ns = int(round(1e9 / args.rate))
    seg = check_segments(work / "data", period_ns)
    after = samples[-1]
    warm = warm_rss or samples[0]
    during = [s for s in samples if s["samples"] >= warm["samples"]]
    third = max(1, len(during) // 3)
    # live memory less what waits in the store's queue (at this speed the queue holds half an
    # hour of sample time between flushes and swings by tens of MB)
    live = [s["rss_kb"] - s["store_queue_kb"] for s in during]
    early = float(np.median(live[:third]))
    late = float(np.median(live[-third:]))
    report = {
        "days": args.days, "channels": args.channels, "rate_hz": args.rate,
        "block_samples": block, "target_samples": target,
        "samples": svc.runners[0].samples, "blocks": svc.runners[0].blocks,
        "elapsed_s": round(elapsed, 1),
        "speedup": round(svc.runners[0].samples / args.rate / max(elapsed, 1e-9), 1),
        "rss_warm_kb": warm["rss_kb"], "rss_end_kb": after["rss_kb"],
        "rss_max_kb": max(s["rss_kb"] for s in during),
        # median of (RSS - store queue) over the last third of the run minus that of the first
        # third after warm-up
        "rss_growth_mb": round((late - early) / 1024, 2),
        "rss_raw_growth_mb": round((float(np.median([s["rss_kb"] for s in during[-third:]]))
                                    - float(np.median([s["rss_kb"] for s in during[:third]])))
                                   / 1024, 2),
        "rss_peak_above_warm_mb": round((max(s["rss_kb"] for s in during) - warm["rss_kb"])
                                        / 1024, 2),
        "fds_min": min(s["fds"] for s in during), "fds_max": max(s["fds"] for s in during),
        # median fd count of the last third minus the first third (a sample taken while a
        # segment rotates sees its two descriptors closed for a moment)
        "fd_growth": int(np.median([s["fds"] for s in during[-third:]])
                         - np.median([s["fds"] for s in during[:third]])),
        "dropped_blocks": store.get("dropped_blocks"), "rows_stored": seg["rows"],
        "segments": len(seg["segments"]), "segments_periodic": seg["periodic"],
        "segment_rows": [s["rows"] for s in seg["segments"]],
        "stopped_cleanly": ok_stop, "trace": samples,
    }
    report["pass"] = bool(report["rss_growth_mb"] < args.max_rss_growth_mb
                          and report["fd_growth"] <= args.max_fd_change
                          and report["dropped_blocks"] == 0 and seg["periodic"]
                          and seg["rows"] == report["samples"] and ok_stop)
    if not args.keep and not args.dir:
        shutil.rmtree(work, ignore_errors=True)
    return report


def main(argv: list[str] | None = None) -> int:
    from straind.memory import add_allocator_argument, apply_allocator_argument
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--days", type=float, default=7.0, help="sample time to run (days)")
    p.add_argument("--channels", type=int, default=16)
    p.add_argument("--rate", type=float, default=10.0, help="samples per second per channel")
    p.add_argument("--block-samples", type=int, default=10,
                   help="samples per block (10: one second; 1: as many blocks as a real week "
                        "at 10 S/s, about ten times slower; 0: the service's default)")
    p.add_argument("--segment-hours", type=float, default=24.0)
    p.add_argument("--sample-every-s", type=float, default=2.0,
                   help="how often RSS and fds are sampled (s of run time)")
    p.add_argument("--warmup", type=float, default=0.1,
                   help="fraction of the run after which RSS is the reference")
    p.add_argument("--max-rss-growth-mb", type=float, default=5.0)
    p.add_argument("--max-fd-change", type=int, default=0,
                   help="allowed growth of the median fd count (last third against first)")
    p.add_argument("--dir", help="work directory (default: a temporary one, removed after)")
    p.add_argument("--keep", action="store_true", help="keep the temporary directory")
    p.add_argument("--log-level", default="warning")
    p.add_argument("--json", action="store_true", help="print one JSON document")
    add_allocator_argument(p)
    args = p.parse_args(argv)
    apply_allocator_argument(args)
    report = run(args)
    if args.json:
        print(json.dumps(report))
    else:
        for k, v in report.items():
            if k != "trace":
                print(f"{k:>20}: {v}")
    return 0 if report["pass"] else 1


if __name__ == "__main__":
    sys.exit(main())
