#!/usr/bin/env python3
"""Benchmark: simulated bridge -> channel chain -> HDF5 store, against plain h5py appends.

Prints, for 32 channels (by default):
  1. the full pipeline flat out (simulated bridge generating, chain converting, store writing),
     in channel-samples per second;
  2. chain + store on pre-generated blocks, and plain h5py appends (the standard API, one append
     per block per dataset) of the same blocks and the same datasets, and their ratio;
  3. the CPU share of one core used by the pipeline paced in real time at 32 x 10 000 S/s.
Everything is measured in this run on this machine; timings vary with the machine's load.

    python tools/bench_pipeline.py [--channels 32] [--block 1000] [--seconds 5] [--realtime-s 10]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

from straind.memory import add_allocator_argument, apply_allocator_argument
from straind.chain import DeviceChain
from straind.config import load_config_text
from straind.drivers.simulated import SimulatedBridge
from straind.store import Store
from straind.supervisor import device_setup
from straind.timebase import Timebase


def _config(channels: int, rate_hz: float, block: int, path: Path, realtime: bool,
            corrections: bool = False, derived_on: bool = False) -> str:
    chans = []
    derived = ""
    bridges = ["quarter", "half-bending", "full-bending", "quarter"]
    first = 0
    if corrections:
        # every correction on: an RTD on the specimen, software thermal-output compensation and
        # GF(T) on every quarter-bridge gauge, 3-wire leads; with derived_on also a rosette with
        # stresses, uniaxial stress and a creep rate
        chans.append("      - {name: rtd, sensor: rtd, element: pt100, reference_ohm: 400, "
                     "wiring: 4-wire, gain: 1, options: {truth: {kind: sine, offset: 120, "
                     "amplitude: 5, frequency_hz: 0.1}}}")
        first = 1
    if derived_on:
        derived = """    derived:
      - {name: ros, kind: rosette, gauges: [c01, c02, c03], layout: rectangular,
         material: {e_mpa: 200000, poisson: 0.3}}
      - {name: sig, kind: uniaxial_stress, gauge: c04, e_mpa: 200000}
      - {name: crp, kind: creep, gauge: c05, window_s: 60, reference: tare}
"""
    for i in range(first, channels):
        b = "quarter" if corrections else bridges[i % len(bridges)]
        thermal = ""
        if corrections:
            thermal = (", thermal: {compensation: software, temperature_channel: rtd, "
                       "thermal_output: {coefficients: [-31.5, 2.21, -0.0412, 1.62e-4, -2.1e-7], "
                       "gauge_factor_ref: 2.0}, gf_alpha_per_c: 1.1e-4}")
        chans.append(
            f"      - {{name: c{i:02d}, sensor: strain_gauge, gauge_factor: 2.05, gauge_ohm: 350, "
            f"bridge: {b}, lead_ohm: {0.5 if b != 'full-bending' else 0}, excitation_v: 5"
            f"{thermal}, options: {{truth: {{kind: sine, offset: {100 * i}, amplitude: 50, "
            f"frequency_hz: 1.5}}}}}}")
    return f"""
station: {{id: bench}}
storage: {{path: {path}, flush_interval_s: 1.0}}
devices:
  - name: d
    driver: simulated-bridge
    sample_rate_hz: {rate_hz}
    block_samples: {block}
    adc: {{gain: 128}}
    options: {{seed: 3, noise_nv_per_v: 30, realtime: {str(realtime).lower()}}}
    channels:
""" + "\n".join(chans) + "\n" + derived


def _pipeline(cfg_text: str, seconds: float | None, blocks: list | None, path: Path,
              max_blocks: int | None = None) -> tuple[int, float, float, list]:
    """Run driver (or pre-made blocks) -> chain -> store; return (rows, wall s, cpu s, blocks)."""
    cfg = load_config_text(cfg_text)
    dev = cfg.devices[0]
    chain = DeviceChain(dev)
    layout = chain.device_layout("simulated-bridge")
    store = Store(cfg.storage, "bench", cfg_text, [layout])
    store.start()
    tb = Timebase(device_setup(dev).period_ns)
    made = []
    rows = 0
    cpu0, t0 = time.process_time(), time.perf_counter()
    if blocks is None:
        drv = SimulatedBridge(device_setup(dev), dev["options"])
        drv.open()
        while True:
            blk = drv.read_block(1.0)
            if blk is None:
                continue
            if max_blocks is not None:
                made.append(blk)
            eng = chain.convert(tb.stamp(blk))
            _submit_waiting(store, eng)
            rows += blk.n_samples
            if seconds is not None and time.perf_counter() - t0 >= seconds:
                break
            if max_blocks is not None and len(made) >= max_blocks:
                break
        drv.close()
    else:
        for blk in blocks:
            eng = chain.convert(tb.stamp(blk))
            _submit_waiting(store, eng)
            rows += blk.n_samples
    store.stop(timeout_s=600)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    st = store.status()
    stored = sum(st["rows_total"].values())
    if st.get("dropped_blocks") or stored != rows:
        print(f"  warning: {rows} rows submitted, {stored} stored, {st['dropped_blocks']} blocks"
              " refused", file=sys.stderr)
    return rows, wall, cpu, made


def _submit_waiting(store: Store, eng) -> None:
    """Flat out the producer outruns the writer: wait while the write queue is over half full
    (back pressure) instead of letting the store refuse blocks and log drops."""
    while True:
        st = store.status()
        if st["queue_bytes"] <= st["queue_limit_bytes"] // 2 and store.submit(eng):
            return
        time.sleep(0.001)


def _plain_h5py(blocks: list, chain: DeviceChain, path: Path) -> tuple[int, float]:
    """The floor: standard h5py appends of the same arrays into the same datasets."""
    m = blocks[0].n_channels
    chunk = max(1024, blocks[0].n_samples)
    engs = [chain.convert(b.with_time(i * 1_000_000_000)) for i, b in enumerate(blocks)]
    k = engs[0].values.shape[1]   # measured and derived columns
    t0 = time.perf_counter()
    with h5py.File(path, "w", libver="latest") as f:
        g = f.create_group("devices/d")
        ds_t = g.create_dataset("time_ns", (0,), np.int64, maxshape=(None,), chunks=(chunk,))
        ds_r = g.create_dataset("raw", (0, m), np.int32, maxshape=(None, m), chunks=(chunk, m))
        ds_v = g.create_dataset("value", (0, k), np.float64, maxshape=(None, k), chunks=(chunk, k))
        ds_q = g.create_dataset("quality", (0, k), np.uint8, maxshape=(None, k), chunks=(chunk, k))
        f.swmr_mode = True
        n = 0
        last_flush = time.perf_counter()
        for blk, eng in zip(blocks, engs):
            k = blk.n_samples
            for ds, arr in ((ds_t, eng.times_ns()), (ds_r, blk.data), (ds_v, eng.values),
                            (ds_q, eng.quality)):
                ds.resize(n + k, axis=0)
                ds[n:n + k] = arr
            n += k
            if time.perf_counter() - last_flush >= 1.0:
                f.flush()
                last_flush = time.perf_counter()
    return n, time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--channels", type=int, default=32)
    ap.add_argument("--block", type=int, default=1000, help="samples per block")
    ap.add_argument("--seconds", type=float, default=5.0, help="flat-out run length")
    ap.add_argument("--realtime-s", type=float, default=10.0,
                    help="length of the real-time CPU measurement (0 to skip)")
    ap.add_argument("--dir", default=None, help="where to write (default: a temp dir)")
    ap.add_argument("--corrections", action="store_true",
                    help="every correction on: RTD, thermal output and GF(T) compensation on "
                         "every gauge (3-wire leads)")
    ap.add_argument("--derived", action="store_true",
                    help="with --corrections: also derived columns (rosette with stresses, "
                         "uniaxial stress, creep rate per sample)")
    add_allocator_argument(ap)
    args = ap.parse_args(argv)
    apply_allocator_argument(args)
    if args.derived and args.channels < 6:
        ap.error("--derived needs --channels 6 or more (a rosette on c01-c03, stress on c04, "
                 "creep on c05)")
    base = Path(args.dir or tempfile.mkdtemp(prefix="straind-bench-"))
    m = args.channels
    try:
        # 1. full pipeline flat out
        cfg = _config(m, 10_000, args.block, base / "p1", False, args.corrections, args.derived)
        rows, wall, cpu, _ = _pipeline(cfg, args.seconds, None, base / "p1")
        full = rows * m / wall
        what = "every correction on" if args.corrections else "plain bridges"
        if args.derived:
            what += " and derived columns"
        print(f"full pipeline (sim -> chain -> HDF5, {what}), {m} ch, blocks of {args.block}: "
              f"{full / 1e6:.2f} M channel-samples/s ({rows} rows in {wall:.2f} s, "
              f"CPU {cpu / wall:.2f} cores)")

        # 2. same blocks: straind chain + store vs plain h5py appends
        n_blocks = max(20, int(full * 2 / (m * args.block)))
        cfg2 = _config(m, 10_000, args.block, base / "p2", False, args.corrections, args.derived)
        dev = load_config_text(cfg2).devices[0]
        drv = SimulatedBridge(device_setup(dev), dev["options"])
        drv.open()
        blocks = [drv.read_block(1.0) for _ in range(n_blocks)]
        drv.close()
        rows2, wall2, _, _ = _pipeline(cfg2, None, blocks, base / "p2")
        ours = rows2 * m / wall2
        (base / "p3").mkdir(parents=True, exist_ok=True)
        rows3, wall3 = _plain_h5py(blocks, DeviceChain(dev), base / "p3" / "plain.h5")
        plain = rows3 * m / wall3
        print(f"same {n_blocks} blocks: straind chain + store {ours / 1e6:.2f} M ch-samples/s; "
              f"plain h5py appends {plain / 1e6:.2f} M ch-samples/s; ratio {ours / plain:.2f}")

        # 3. real-time CPU share at 32 x 10 000 S/s
        if args.realtime_s > 0:
            cfg4 = _config(m, 10_000, 1000, base / "p4", True, args.corrections, args.derived)
            rows4, wall4, cpu4, _ = _pipeline(cfg4, args.realtime_s, None, base / "p4")
            print(f"real time {m} ch x 10 000 S/s for {wall4:.1f} s: {rows4 * m / wall4 / 1e3:.0f} k "
                  f"ch-samples/s using {100 * cpu4 / wall4:.1f} % of one core")
    finally:
        if args.dir is None:
            shutil.rmtree(base, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
