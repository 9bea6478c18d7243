"""The channel chain: codes -> engineering values per block, checked against outside sources."""

from __future__ import annotations

import numpy as np
import pytest

from straind.block import CODE_MAX, CODE_MIN, Block, Quality
from straind.chain import DeviceChain
from straind.config import load_config_text

HEAD = """
station: {id: s}
storage: {path: /tmp/unused}
devices:
  - name: d
    driver: simulated-bridge
    sample_rate_hz: 100
    adc: {gain: 128}
    channels:
"""
TRUTH = "options: {truth: {kind: constant, value: 0}}"


def _chain(channels_yaml: str) -> DeviceChain:
    cfg = load_config_text(HEAD + channels_yaml)
    return DeviceChain(cfg.devices[0])


def _block(codes: np.ndarray) -> Block:
    codes = np.asarray(codes, dtype=np.int32)
    if codes.ndim == 1:
        codes = codes[:, None]
    return Block("d", codes, np.zeros(codes.shape, np.uint8), 0, 10_000_000, 0, 0, 0, t0_ns=0)


def _bridge_nodal(r1: float, r2: float, r3: float, r4: float) -> float:
    """Vo/Vex by nodal analysis of the Wheatstone network, independent of straind.bridge.

    Excitation node at 1 V, return at 0 V; arm 2 joins the excitation to node A and arm 1 joins
    A to the return; arm 3 joins the excitation to node B and arm 4 joins B to the return. KCL at
    A and B gives G v = i; the output ratio is V(A) - V(B) (our sign convention)."""
    g = np.array([[1 / r1 + 1 / r2, 0.0], [0.0, 1 / r3 + 1 / r4]])
    # arm 1 from bottom to A, arm 2 from A to top; arm 4 from bottom to B, arm 3 from B to top
    rhs = np.array([1.0 / r2, 1.0 / r3])
    va, vb = np.linalg.solve(g, rhs)
    # V(A) = R1/(R1+R2), V(B) = R4/(R3+R4)
    return va - vb


def test_quarter_bridge_worked_value() -> None:
    # common practice (rule of thumb): 1000 microstrain at GF 2 gives Vr = 4.995005e-4 V/V
    ch = _chain(f"""      - {{name: g, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: quarter, excitation_v: 5, {TRUTH}}}
""")
    code = round(4.995005e-4 * 2**23 * 128)
    out = ch.convert(_block([code]))
    # one code is about 0.0019 microstrain at G 128 (one code is 1 / (2**23 * 128) = 9.31e-10 V/V)
    assert out.values[0, 0] == pytest.approx(1000.0, abs=0.002)
    assert out.units == ("microstrain",)


def test_load_cell_rated_output() -> None:
    # OIML R60 (rated output): 2 mV/V at 50 kN capacity -> 1 mV/V reads 25 kN
    ch = _chain(f"""      - {{name: f, sensor: bridge_transducer, quantity: force, unit: kN,
         rated_output_mv_per_v: 2.0, capacity: 50, excitation_v: 10, {TRUTH}}}
""")
    code = round(1e-3 * 2**23 * 128)
    assert ch.convert(_block([code])).values[0, 0] == pytest.approx(25.0, rel=1e-6)


def test_load_cell_certificate_cubic() -> None:
    # certificate points that follow value = 5 r + 0.1 r^2 - 0.01 r^3 exactly (r in mV/V):
    # the least-squares cubic (ISO 376 allows degree 1 to 3) reproduces it
    pts = [[r, 5 * r + 0.1 * r**2 - 0.01 * r**3] for r in (0.0, 0.5, 1.0, 1.5, 2.0)]
    ch = _chain(f"""      - {{name: f, sensor: bridge_transducer, quantity: force, unit: kN,
         certificate: {{points: {pts}, degree: 3}}, excitation_v: 10, {TRUTH}}}
""")
    r = 1.234
    code = round(r * 1e-3 * 2**23 * 128)
    r_q = code / (2**23 * 128) * 1e3
    expect = 5 * r_q + 0.1 * r_q**2 - 0.01 * r_q**3
    assert ch.convert(_block([code])).values[0, 0] == pytest.approx(expect, rel=1e-9)


def test_saturation_flagged_never_converted() -> None:
    ch = _chain(f"""      - {{name: g, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: quarter, excitation_v: 5, {TRUTH}}}
""")
    out = ch.convert(_block([CODE_MAX, CODE_MIN, CODE_MAX - 1, 0]))
    assert np.isnan(out.values[:2, 0]).all()
    assert (out.quality[:2, 0] & Quality.SATURATED).all()
    assert np.isfinite(out.values[2:, 0]).all() and not (out.quality[2:, 0] & Quality.SATURATED).any()


def test_open_bridge_from_driver_is_nan() -> None:
    ch = _chain(f"""      - {{name: g, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: quarter, excitation_v: 5, {TRUTH}}}
""")
    blk = _block([100, 200])
    q = blk.quality.copy()
    q[1, 0] = Quality.OPEN_BRIDGE
    out = ch.convert(blk.with_quality(q))
    assert np.isfinite(out.values[0, 0]) and np.isnan(out.values[1, 0])


def test_two_wire_tare_against_nodal_analysis() -> None:
    """2-wire quarter bridge with 1.5 ohm leads, tared at 300 microstrain, then loaded to
    1300: the chain's value equals the strain whose nodal-analysis ratio is the tared ratio
    mapped onto the model's zero, found by bisection."""
    ch = _chain(f"""      - {{name: g, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 120,
         bridge: quarter, wiring: 2-wire, lead_ohm: 1.5, excitation_v: 5, {TRUTH}}}
""")
    rg, rl, gf = 120.0, 1.5, 2.0

    def ratio(eps: float) -> float:
        return _bridge_nodal(rg * (1 + gf * eps) + 2 * rl, rg, rg, rg)

    ch.set_zero(0, ratio(300e-6))
    scale = 2**23 * 128
    v = ratio(1300e-6)
    out = ch.convert(_block([round(v * scale)]))
    resolution = 1 / scale * 4 / gf * 1e6
    # the tare maps the ratio at the tare instant onto the model's zero-strain ratio
    x_now = (v + ratio(0.0) - ratio(300e-6))
    assert out.values[0, 0] == pytest.approx(
        _two_wire_strain(x_now, rg, rl, gf), abs=resolution)


def _two_wire_strain(target_ratio: float, rg: float, rl: float, gf: float) -> float:
    """Bisection on the nodal model: the strain whose 2-wire ratio equals target_ratio."""
    lo, hi = -0.05, 0.05
    for _ in range(200):
        mid = (lo + hi) / 2
        if _bridge_nodal(rg * (1 + gf * mid) + 2 * rl, rg, rg, rg) < target_ratio:
            lo = mid
        else:
            hi = mid
    return (lo + hi) / 2 * 1e6


def test_mobius_fast_path_equals_general_path() -> None:
    """The custom arrangement k = (1, -1, 0, 0) is a half bridge in bending solved by Newton;
    it must agree with the closed-form fast path of half-bending (Dally & Riley: Vr = x/2)."""
    ch = _chain(f"""      - {{name: a, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: half-bending, excitation_v: 5, {TRUTH}}}
      - {{name: b, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: custom, arms: [1.0, -1.0, 0.2, 0.0], excitation_v: 5, {TRUTH}}}
      - {{name: c, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: custom, arms: [1.0, -1.0, 0.0, 0.0], excitation_v: 5, {TRUTH}}}
""")
    assert ch.converters[0].mobius is not None
    assert ch.converters[1].mobius is None
    codes = np.linspace(-4_000_000, 4_000_000, 101).astype(np.int32)
    blk = _block(np.stack([codes, codes, codes], axis=1))
    out = ch.convert(blk)
    ratio = codes / (2**23 * 128)
    # half bridge, bending: x = 2 Vr (Dally & Riley, Experimental Stress Analysis)
    assert np.allclose(out.values[:, 0], 2 * ratio / 2.0 * 1e6, rtol=1e-12, atol=1e-9)
    assert np.allclose(out.values[:, 2], out.values[:, 0], rtol=1e-9, atol=1e-6)


def test_range_table_quarter_bridge() -> None:
    ch = _chain(f"""      - {{name: g, sensor: strain_gauge, gauge_factor: 2.0, gauge_ohm: 350,
         bridge: quarter, excitation_v: 5, {TRUTH}}}
""")
    row = ch.range_table()[0]
    # full scale 1/128 V/V = 7.8 mV/V at G 128; quarter bridge x = 4Vr/(1-2Vr) (Dally & Riley)
    fs = (2**23 - 2) / (2**23 * 128)
    assert row["max"] == pytest.approx(4 * fs / (1 - 2 * fs) / 2 * 1e6, rel=1e-9)
    assert row["resolution"] == pytest.approx(0.0019, rel=0.03)
