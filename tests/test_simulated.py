"""Tests of the simulated bridge converter: physics against independent oracles, determinism,
noise/mains/drift statistics, saturation, truth scenarios, shunt switching and the driver
contract.

The bridge oracle here is nodal analysis of the physical network (leads and sense wires as
separate resistors) solved with numpy.linalg.solve; it shares nothing with the simulator's
divider arithmetic.
"""

from __future__ import annotations

import math
import time
from typing import Any

import numpy as np
import pytest

from straind.block import CODE_MAX, CODE_MIN, Quality
from straind.drivers.base import (
    ChannelSetup,
    DeviceSetup,
    DriverConfigError,
    DriverIOError,
    NotSupported,
)
from straind.drivers.simulated import PAGE_SAMPLES, BridgeSimulator, SimulatedBridge
from straind.plugins import load_driver
from straind.schema import ConfigError, validate

FS = 2 ** 23


# ------------------------------------------------------------------------------------------
# helpers
# ------------------------------------------------------------------------------------------

def gauge(index: int, truth: dict, name: str | None = None, options: dict | None = None,
          **cfg: Any) -> ChannelSetup:
    """A strain-gauge channel as the validated configuration would hand it over."""
    config = dict(sensor="strain_gauge", excitation_v=5.0, gauge_factor=2.0, gauge_ohm=350.0,
                  bridge="quarter", wiring="3-wire", lead_ohm=0.0, completion_ohm=None,
                  poisson=None, arms=None, shunt=None)
    config.update(cfg)
    opts = validate(SimulatedBridge.CHANNEL_OPTIONS, {"truth": truth, **(options or {})})
    return ChannelSetup(name or f"ch{index}", index, config, opts)


def transducer(index: int, truth: dict, options: dict | None = None, **cfg: Any) -> ChannelSetup:
    config = dict(sensor="bridge_transducer", excitation_v=10.0, quantity="force", unit="N",
                  rated_output_mv_per_v=None, capacity=None, certificate=None, shunt=None)
    config.update(cfg)
    opts = validate(SimulatedBridge.CHANNEL_OPTIONS, {"truth": truth, **(options or {})})
    return ChannelSetup(f"load{index}", index, config, opts)


def device(*channels: ChannelSetup, gain: int = 128, reference: str = "excitation",
           vref_v: float | None = None, rate_hz: float = 1000.0, block: int = 100) -> DeviceSetup:
    return DeviceSetup("dev", rate_hz, block, tuple(channels),
                       {"adc": {"gain": gain, "reference": reference, "vref_v": vref_v}})


def sim(setup: DeviceSetup, **options: Any) -> BridgeSimulator:
    opts = validate(SimulatedBridge.OPTIONS, {"noise_nv_per_v": 0.0, **options})
    return BridgeSimulator(setup, opts)


def const(value: float) -> dict:
    return {"kind": "constant", "value": value}


def solve_network(elements: list[tuple[str, str, float]], v_ex: float,
                  fixed: dict[str, float] | None = None) -> dict[str, float]:
    """Node voltages of a resistor network with node A at v_ex and node C at 0 V (nodal analysis)."""
    fixed = fixed or {"A": v_ex, "C": 0.0}
    nodes = sorted({n for a, b, _ in elements for n in (a, b)} - set(fixed))
    pos = {n: i for i, n in enumerate(nodes)}
    g = np.zeros((len(nodes), len(nodes)))
    i_src = np.zeros(len(nodes))
    for a, b, r in elements:
        cond = 1.0 / r
        for p, q in ((a, b), (b, a)):
            if p in pos:
                g[pos[p], pos[p]] += cond
                if q in pos:
                    g[pos[p], pos[q]] -= cond
                else:
                    i_src[pos[p]] += cond * fixed[q]
    v = np.linalg.solve(g, i_src)
    out = dict(fixed)
    out.update({n: float(v[pos[n]]) for n in nodes})
    return out


def inverse_quarter_3wire(vr: np.ndarray, r: float = 0.0) -> np.ndarray:
    """x from Vr for a quarter bridge, 3-wire (Window, Strain Gauge Technology: 3-wire quarter bridge)."""
    return 4.0 * vr * (1.0 + r) / (1.0 - 2.0 * vr)


# ------------------------------------------------------------------------------------------
# worked checks and the forward model against nodal analysis
# ------------------------------------------------------------------------------------------

def test_quarter_bridge_1000_microstrain_worked_check():
    s = sim(device(gauge(0, const(1000.0))))
    codes, quality = s.codes(0, 500)
    # common practice (worked check): quarter bridge, GF 2, 1000 microstrain -> Vr 4.995005e-4,
    # reading low by x/2 against the linear 5.0e-4; code = Vr * 2**23 * gain (ratiometric)
    expected = 4.995005e-4 * FS * 128
    assert abs(codes.mean() - expected) <= 1.0
    assert np.all(codes == codes[0]) and not quality.any()


def _gauge_r(gauge_ohm: float, k: float, x: float) -> float:
    return gauge_ohm * (1.0 + k * x)


def _netlist(case: str, x: float, rg: float, rc: float, rl: float) -> tuple[list, str, str, str, str]:
    """Physical network for one wiring case: (elements, out+, out-, sense+, sense-)."""
    if case == "quarter-2wire":
        # both leads in series with the gauge in arm 1; output taken at the instrument
        el = [("A", "B", rc), ("B", "g1", rl), ("g1", "g2", _gauge_r(rg, 1, x)), ("g2", "C", rl),
              ("A", "D", rc), ("D", "C", rc)]
        return el, "B", "D", "A", "C"
    if case == "quarter-3wire":
        # lead 1 carries arm-1 current, lead 2 joins the completion arm 2, lead 3 is the sense
        el = [("A", "P", rc), ("P", "G1", rl), ("G1", "S", rl), ("G1", "G2", _gauge_r(rg, 1, x)),
              ("G2", "C", rl), ("A", "D", rc), ("D", "C", rc)]
        return el, "S", "D", "A", "C"
    if case == "half-bending-3wire":
        el = [("A", "T", rl), ("T", "J", _gauge_r(rg, -1, x)), ("J", "S", rl),
              ("J", "Bo", _gauge_r(rg, 1, x)), ("Bo", "C", rl), ("A", "D", rc), ("D", "C", rc)]
        return el, "S", "D", "A", "C"
    if case == "half-poisson-2wire":
        nu = 0.3
        el = [("A", "t1", rl), ("t1", "t2", _gauge_r(rg, -nu, x)), ("t2", "B", rl),
              ("B", "b1", rl), ("b1", "b2", _gauge_r(rg, 1, x)), ("b2", "C", rl),
              ("A", "D", rc), ("D", "C", rc)]
        return el, "B", "D", "A", "C"
    if case == "half-opposite-3wire":
        el = [("A", "B", rc), ("B", "q", _gauge_r(rg, 1, x)), ("q", "C", rl),
              ("A", "p", rl), ("p", "D", _gauge_r(rg, 1, x)), ("D", "C", rc)]
        return el, "B", "D", "A", "C"
    if case == "full-poisson-sensed":
        nu = 0.3
        # excitation leads drop voltage; the ratio is taken against the sensed excitation
        el = [("A", "Ar", rl), ("Cr", "C", rl),
              ("Ar", "B", _gauge_r(rg, -nu, x)), ("B", "Cr", _gauge_r(rg, 1, x)),
              ("Ar", "D", _gauge_r(rg, 1, x)), ("D", "Cr", _gauge_r(rg, -nu, x))]
        return el, "B", "D", "Ar", "Cr"
    if case == "custom-3wire":
        k1, k2, k3 = 1.0, 0.3, -0.5
        # left half: both arms remote on three wires; right half: gauge in arm 3 on three
        # wires with its completion arm 4 at the instrument
        el = [("A", "T", rl), ("T", "J", _gauge_r(rg, k2, x)), ("J", "S", rl),
              ("J", "Bo", _gauge_r(rg, k1, x)), ("Bo", "C", rl),
              ("A", "p", rl), ("p", "G", _gauge_r(rg, k3, x)), ("G", "S2", rl), ("G", "Q", rl),
              ("Q", "C", rc)]
        return el, "S", "S2", "A", "C"
    if case == "custom-2wire":
        el = [("A", "B", rc), ("B", "u", rl), ("u", "w", _gauge_r(rg, 1.0, x)), ("w", "C", rl),
              ("A", "e", rl), ("e", "f", _gauge_r(rg, -1.0, x)), ("f", "D", rl), ("D", "C", rc)]
        return el, "B", "D", "A", "C"
    raise AssertionError(case)


_CASES = {
    "quarter-2wire": dict(bridge="quarter", wiring="2-wire"),
    "quarter-3wire": dict(bridge="quarter", wiring="3-wire"),
    "half-bending-3wire": dict(bridge="half-bending", wiring="3-wire"),
    "half-poisson-2wire": dict(bridge="half-poisson", wiring="2-wire", poisson=0.3),
    "half-opposite-3wire": dict(bridge="half-opposite", wiring="3-wire"),
    "full-poisson-sensed": dict(bridge="full-poisson", poisson=0.3),
    "custom-3wire": dict(bridge="custom", wiring="3-wire", arms=[1.0, 0.3, -0.5, 0.0]),
    "custom-2wire": dict(bridge="custom", wiring="2-wire", arms=[1.0, 0.0, -1.0, 0.0]),
}


@pytest.mark.parametrize("case", sorted(_CASES))
def test_forward_model_matches_nodal_analysis(case):
    rg, rc, rl, gf, ex = 350.0, 349.0, 1.7, 2.1, 5.0
    strains = np.array([-4000.0, -1000.0, 0.0, 250.0, 1000.0, 3000.0])
    ch = gauge(0, {"kind": "steps", "levels": strains.tolist(), "step_s": 0.01},
               gauge_factor=gf, gauge_ohm=rg, completion_ohm=rc, lead_ohm=rl, excitation_v=ex,
               **_CASES[case])
    s = sim(device(ch, gain=16))
    ratio = s.ratio(0, 60)[5::10, 0]
    codes = s.codes(0, 60)[0][5::10, 0]
    for eps, r_sim, c_sim in zip(strains, ratio, codes):
        el, op, om, sp, sm = _netlist(case, gf * eps * 1e-6, rg, rc, rl)
        v = solve_network(el, ex)
        # nodal analysis of the Wheatstone network (Dally & Riley, 4th ed., bridge circuits)
        r_oracle = (v[op] - v[om]) / (v[sp] - v[sm])
        assert r_sim == pytest.approx(r_oracle, rel=1e-9, abs=1e-13)
        assert abs(c_sim - r_oracle * FS * 16) <= 0.5 + 1e-6


def test_true_gauge_factor_gf2_offset_and_true_lead_against_nodal_analysis():
    rg, rl_true = 120.0, 0.9
    options = {"true_gauge_factor": 2.05, "true_gauge_factor2": 60.0, "gauge_ohm_offset": 0.35,
               "true_lead_ohm": rl_true}
    ch = gauge(0, const(2500.0), gauge_factor=2.0, gauge_ohm=rg, lead_ohm=0.2, options=options)
    ratio = sim(device(ch)).ratio(0, 1)[0, 0]
    eps = 2500e-6
    x = 2.05 * eps + 60.0 * eps ** 2          # semiconductor-style quadratic gauge law
    el = [("A", "P", rg), ("P", "G1", rl_true), ("G1", "S", rl_true),
          ("G1", "G2", (rg + 0.35) * (1 + x)), ("G2", "C", rl_true), ("A", "D", rg), ("D", "C", rg)]
    v = solve_network(el, 5.0)
    assert ratio == pytest.approx((v["S"] - v["D"]) / 5.0, rel=1e-10)


def test_external_reference_and_true_excitation():
    eps = 800.0
    base = sim(device(gauge(0, const(eps)))).codes(0, 1)[0][0, 0]
    # ratiometric: a wrong actual excitation cancels (common practice)
    off = sim(device(gauge(0, const(eps), options={"true_excitation_v": 4.9}))).codes(0, 1)[0][0, 0]
    assert off == base
    # external reference: code = Vr * Vex * gain * 2**23 / Vref (common practice)
    ext = sim(device(gauge(0, const(eps), options={"true_excitation_v": 4.9}),
                     reference="external", vref_v=2.5)).codes(0, 1)[0][0, 0]
    vr = 2e-3 * 0.8 / (2 * (2 + 2e-3 * 0.8))   # quarter bridge, Dally & Riley
    assert abs(ext - vr * 4.9 * 128 * FS / 2.5) <= 0.5 + 1e-6


def test_transducer_rated_output_and_certificate():
    # value = (Vr / S) * C  (common practice; OIML R60 terms): 2500 N on 5000 N at 2 mV/V -> 1 mV/V
    rated = transducer(0, const(2500.0), rated_output_mv_per_v=2.0, capacity=5000.0)
    points = [[0.0, 0.0], [0.5, 1010.0], [1.0, 2000.0], [1.5, 3020.0], [2.0, 4000.0]]
    cert = transducer(1, {"kind": "ramp", "start": 100.0, "rate_per_s": 1000.0},
                      certificate={"points": points, "degree": 2})
    s = sim(device(rated, cert))
    codes, _ = s.codes(0, 4)
    assert abs(codes[0, 0] - 1e-3 * FS * 128) <= 0.5 + 1e-6
    # ISO 376: least-squares polynomial of the certificate, here evaluated by numpy.polyfit
    fit = np.polyfit([p[0] for p in points], [p[1] for p in points], 2)
    mv_per_v = codes[:, 1] / (FS * 128) * 1e3
    value = np.polyval(fit, mv_per_v)
    assert value == pytest.approx(s.truth(0, 4)[:, 1], abs=0.01)


# ------------------------------------------------------------------------------------------
# determinism
# ------------------------------------------------------------------------------------------

def _noisy(seed: int = 7) -> BridgeSimulator:
    chs = [gauge(0, const(500.0)), gauge(1, {"kind": "sine", "amplitude": 100.0,
                                             "frequency_hz": 3.0})]
    return sim(device(*chs), seed=seed, noise_nv_per_v=50.0, mains_nv_per_v=20.0,
               drift_nv_per_v_per_h=100.0)


def test_same_seed_same_codes_and_block_size_independence():
    whole, q_whole = _noisy().codes(0, 5000)
    again = _noisy()
    a, _ = again.codes(0, 1234)
    b, _ = again.codes(1234, 3766)
    assert np.array_equal(whole, np.concatenate([a, b]))
    # asked in another order, across page boundaries, by a fresh generator
    late = _noisy()
    tail, _ = late.codes(3 * PAGE_SAMPLES - 5, 10)
    head, _ = late.codes(0, 17)
    assert np.array_equal(tail, _noisy().codes(0, 5000 + 3 * PAGE_SAMPLES)[0][3 * PAGE_SAMPLES - 5:
                                                                                3 * PAGE_SAMPLES + 5])
    assert np.array_equal(head, whole[:17])
    assert whole.dtype == np.int32 and q_whole.dtype == np.uint8 and whole.shape == (5000, 2)


def test_different_seed_different_noise_and_channels_independent():
    a, _ = _noisy(1).codes(0, 4000)
    b, _ = _noisy(2).codes(0, 4000)
    assert not np.array_equal(a, b)
    chs = [gauge(i, const(0.0)) for i in range(2)]
    codes, _ = sim(device(*chs), noise_nv_per_v=100.0).codes(0, 20000)
    assert abs(np.corrcoef(codes[:, 0], codes[:, 1])[0, 1]) < 0.05


# ------------------------------------------------------------------------------------------
# noise, mains, drift
# ------------------------------------------------------------------------------------------

def test_noise_rms_matches_configuration():
    chs = [gauge(0, const(300.0)), gauge(1, const(300.0), options={"noise_nv_per_v": 5.0})]
    setup = device(*chs)
    clean = sim(setup).ratio(0, 1)[0] * FS * 128          # noise-free, unrounded
    codes, _ = sim(setup, noise_nv_per_v=20.0, seed=3).codes(0, 40000)
    step_nv = 1e9 / (FS * 128)          # one code in nV/V (1 / (2**23 * 128) = 9.31e-10 V/V at G 128)
    dev_nv = (codes - clean) * step_nv
    rms = np.sqrt(np.mean(dev_nv ** 2, axis=0))
    expected = np.sqrt(np.array([20.0, 5.0]) ** 2 + step_nv ** 2 / 12)   # plus quantisation
    assert rms == pytest.approx(expected, rel=0.03)
    assert abs(dev_nv[:, 0].mean()) < 0.5


@pytest.mark.parametrize("mains_hz", [50, 60])
def test_mains_pickup_peak_at_its_frequency(mains_hz):
    n, rate = 3000, 1000.0
    codes, _ = sim(device(gauge(0, const(0.0)), rate_hz=rate), mains_hz=mains_hz,
                   mains_nv_per_v=30.0).codes(0, n)
    ratio_nv = codes[:, 0] / (FS * 128) * 1e9
    spec = np.abs(np.fft.rfft(ratio_nv - ratio_nv.mean()))
    freqs = np.fft.rfftfreq(n, 1.0 / rate)
    assert freqs[np.argmax(spec)] == pytest.approx(mains_hz)
    assert 2 * spec.max() / n == pytest.approx(30.0, rel=0.02)   # peak amplitude


def test_drift_slope_follows_sample_clock():
    rate, n = 100.0, 3000
    for scale in (1.0, 500.0):
        codes, _ = sim(device(gauge(0, const(0.0)), rate_hz=rate),
                       drift_nv_per_v_per_h=3600.0, time_scale=scale).codes(0, n)
        hours = np.arange(n) / rate / 3600.0
        slope = np.polyfit(hours, codes[:, 0] / (FS * 128) * 1e9, 1)[0]
        assert slope == pytest.approx(3600.0, rel=0.01)


# ------------------------------------------------------------------------------------------
# saturation and open bridges
# ------------------------------------------------------------------------------------------

def test_saturation_codes_and_open_bridge():
    chs = [gauge(0, const(20000.0)), gauge(1, const(-20000.0)), gauge(2, const(7000.0)),
           gauge(3, const(100.0), name="broken")]
    codes, q = sim(device(*chs), noise_nv_per_v=500.0, open_bridge_channels=["broken"]).codes(0, 300)
    # full scale at gain 128 is 1/128 V/V = 7.8 mV/V (arithmetic); 20000 microstrain on a
    # GF 2 quarter bridge is about 9.9 mV/V
    assert np.all(codes[:, 0] == CODE_MAX) and np.all(codes[:, 1] == CODE_MIN)
    assert np.all(q[:, :2] & Quality.SATURATED)
    assert np.all((codes[:, 2] > CODE_MIN) & (codes[:, 2] < CODE_MAX)) and not q[:, 2].any()
    assert np.all(codes[:, 3] == CODE_MAX)
    assert np.all(q[:, 3] & Quality.OPEN_BRIDGE) and not np.any(q[:, :3] & Quality.OPEN_BRIDGE)


def test_creep_rupture_opens_the_bridge():
    truth = {"kind": "creep", "elastic_microstrain": 1000.0, "rupture_s": 5.0}
    codes, q = sim(device(gauge(0, truth), rate_hz=10.0)).codes(0, 100)
    assert not q[:50].any() and np.all(q[50:, 0] & Quality.OPEN_BRIDGE)
    assert np.all(codes[50:, 0] == CODE_MAX)


# ------------------------------------------------------------------------------------------
# truth scenarios
# ------------------------------------------------------------------------------------------

def _truth(truth: dict, t_s: np.ndarray, rate_hz: float = 10.0, scale: float = 1.0) -> np.ndarray:
    s = sim(device(gauge(0, truth), rate_hz=rate_hz), time_scale=scale)
    idx = np.rint(t_s * rate_hz / scale).astype(int)
    return np.array([s.truth(int(i), 1)[0, 0] for i in idx])


def test_truth_constant_steps_ramp_sine():
    t = np.array([0.0, 0.5, 1.9, 2.0, 3.0, 4.5, 6.0, 100.0])
    assert np.all(_truth(const(42.0), t) == 42.0)
    steps = {"kind": "steps", "levels": [0.0, 100.0, -50.0], "step_s": 2.0}
    assert _truth(steps, t).tolist() == [0, 0, 0, 100, 100, -50, -50, -50]
    assert _truth({**steps, "repeat": True}, t).tolist() == [0, 0, 0, 100, 100, -50, 0, -50]
    timed = {"kind": "steps", "levels": [10.0, 20.0], "times_s": [1.0, 3.0], "initial": 5.0}
    assert _truth(timed, t).tolist() == [5, 5, 10, 10, 20, 20, 20, 20]
    ramp = {"kind": "ramp", "start": 100.0, "rate_per_s": 2.0, "start_s": 1.0, "until_s": 5.0}
    assert _truth(ramp, t) == pytest.approx([100, 100, 101.8, 102, 104, 107, 108, 108])
    sine = {"kind": "sine", "offset": 10.0, "amplitude": 3.0, "frequency_hz": 0.25, "phase_deg": 30}
    assert _truth(sine, t) == pytest.approx(10 + 3 * np.sin(2 * np.pi * 0.25 * t + np.pi / 6))


_CREEP = {"kind": "creep", "load_at_s": 10.0, "elastic_microstrain": 500.0,
          "primary_microstrain": 200.0, "primary_tau_s": 100.0,
          "secondary_microstrain_per_h": 36.0, "tertiary_microstrain": 5.0,
          "tertiary_onset_s": 5000.0, "tertiary_tau_s": 1000.0}


def _creep_formula(t: np.ndarray, p: dict = _CREEP) -> np.ndarray:
    dt = t - p["load_at_s"]
    eps = (p["elastic_microstrain"] + p["primary_microstrain"] * (1 - np.exp(-dt / p["primary_tau_s"]))
           + p["secondary_microstrain_per_h"] / 3600 * dt)
    onset = p["tertiary_onset_s"]
    eps = eps + np.where(t > onset, p["tertiary_microstrain"]
                         * (np.exp((t - onset) / p["tertiary_tau_s"]) - 1), 0.0)
    return np.where(t >= p["load_at_s"], eps, 0.0)


def test_truth_creep_stages():
    t = np.arange(0.0, 9000.0, 1.0)
    s = sim(device(gauge(0, _CREEP), rate_hz=10.0), time_scale=10.0)   # one sample per truth s
    eps = s.truth(0, t.size)[:, 0]
    assert eps == pytest.approx(_creep_formula(t), rel=1e-12, abs=1e-9)
    assert np.all(eps[:10] == 0.0) and eps[10] == pytest.approx(500.0)
    # primary: one time constant after load, 1 - 1/e of the primary amplitude (plus the steady rate)
    assert eps[110] == pytest.approx(500 + 200 * (1 - math.exp(-1)) + 0.01 * 100, rel=1e-12)
    # secondary: a steady 36 microstrain/h = 0.01 microstrain/s once the primary has died out
    assert np.polyfit(t[2000:4000], eps[2000:4000], 1)[0] == pytest.approx(0.01, rel=1e-6)
    # tertiary: the rate accelerates after the onset, decelerates (primary) before it
    curvature = np.diff(eps, 2)
    assert np.all(curvature[3000:4990] <= 1e-9) and np.all(curvature[5001:] > 0)
    assert np.diff(eps)[8000] > 2 * np.diff(eps)[4000]


def test_creep_through_the_bridge_and_time_scale():
    # a week of truth in 1000 samples: 1 Hz sample clock, time_scale 604.8
    week = {"kind": "creep", "load_at_s": 3600.0, "elastic_microstrain": 1000.0,
            "primary_microstrain": 300.0, "primary_tau_s": 6 * 3600.0,
            "secondary_microstrain_per_h": 20.0, "tertiary_microstrain": 50.0,
            "tertiary_onset_s": 5 * 86400.0, "tertiary_tau_s": 86400.0}
    s = sim(device(gauge(0, week), rate_hz=1.0), time_scale=604.8)
    codes, _ = s.codes(0, 1000)
    truth = s.truth(0, 1000)[:, 0]
    assert truth == pytest.approx(_creep_formula(np.arange(1000) * 604.8, week), rel=1e-12)
    assert 4000 < truth[-1] < 15000          # below the converter's full scale (~15 900)
    eps_back = inverse_quarter_3wire(codes[:, 0] / (FS * 128)) / 2.0 * 1e6
    assert eps_back == pytest.approx(truth, abs=0.01)   # one code is ~0.002 microstrain


# ------------------------------------------------------------------------------------------
# shunt calibration
# ------------------------------------------------------------------------------------------

def test_shunt_on_active_arm_gives_minus_1000_microstrain():
    ch = gauge(0, const(0.0), shunt={"ohm": 174650.0, "arm": 1})
    s = sim(device(ch, gauge(1, const(0.0))))
    before, q0 = s.codes(0, 100)
    assert np.all(before == 0) and not q0.any()
    s.set_shunt(0, True, from_index=150)
    codes, q = s.codes(100, 100)
    assert not q[:50].any() and np.all(q[50:, 0] == Quality.SHUNT_ON) and not q[:, 1].any()
    el = [("A", "B", 350.0), ("B", "C", 350.0), ("B", "C", 174650.0), ("A", "D", 350.0),
          ("D", "C", 350.0)]
    v = solve_network(el, 5.0)
    oracle = (v["B"] - v["D"]) / 5.0
    vr = codes[50:, 0] / (FS * 128)
    assert np.all(np.abs(vr - oracle) <= 0.5 / (FS * 128) + 1e-15)
    # Window, Strain Gauge Technology, 2nd ed. / common practice worked check:
    # Rg 350, GF 2, Rs 174 650 -> -1000 microstrain through the exact quarter-bridge inverse
    assert inverse_quarter_3wire(vr) / 2.0 * 1e6 == pytest.approx(-1000.0, abs=0.005)
    s.set_shunt(0, False)
    after, q2 = s.codes(200, 10)
    assert np.all(after == 0) and not q2.any()


def test_shunt_on_completion_arm_simulates_tension_and_transducer_shunt():
    # a shunt on the adjacent completion arm simulates tension (Window, Strain Gauge Technology)
    ch = gauge(0, const(0.0), shunt={"ohm": 174650.0, "arm": 2}, lead_ohm=0.5)
    load = transducer(1, const(0.0), rated_output_mv_per_v=2.0, capacity=1000.0,
                      shunt={"ohm": 100000.0, "arm": 4}, options={"bridge_ohm": 350.0})
    s = sim(device(ch, load))
    s.set_shunt(0, True)
    s.set_shunt(1, True)
    ratio = s.ratio(0, 1)[0]
    # 3-wire quarter bridge; the shunt spans arm 2 with its lead
    el = [("A", "P", 350.0), ("P", "G1", 0.5), ("A", "G1", 174650.0), ("G1", "S", 0.5),
          ("G1", "G2", 350.0), ("G2", "C", 0.5), ("A", "D", 350.0), ("D", "C", 350.0)]
    v = solve_network(el, 5.0)
    assert ratio[0] == pytest.approx((v["S"] - v["D"]) / 5.0, rel=1e-9) and ratio[0] > 0
    el = [("A", "B", 350.0), ("B", "C", 350.0), ("A", "D", 350.0), ("D", "C", 350.0),
          ("D", "C", 100000.0)]
    v = solve_network(el, 10.0)
    assert ratio[1] == pytest.approx((v["B"] - v["D"]) / 10.0, rel=1e-9)


def test_shunt_not_configured_is_refused():
    s = sim(device(gauge(0, const(0.0))))
    with pytest.raises(NotSupported):
        s.set_shunt(0, True)
    with pytest.raises(DriverConfigError, match=r"channels\[0\]\.shunt"):
        s.set_shunt(0, True)


# ------------------------------------------------------------------------------------------
# the driver
# ------------------------------------------------------------------------------------------

def _driver(setup: DeviceSetup, **options: Any) -> SimulatedBridge:
    opts = validate(SimulatedBridge.OPTIONS, {"realtime": False, **options})
    SimulatedBridge.check_setup(setup, opts, "devices[0]")
    return SimulatedBridge(setup, opts)


def test_registered_and_described():
    assert load_driver("simulated-bridge") is SimulatedBridge
    info = _driver(device(gauge(0, const(0.0)))).describe()
    assert info.can_shunt and info.max_channels == 32 and info.native == "code24"
    assert (info.min_rate_hz, info.max_rate_hz) == (1.0, 10000.0)


def test_open_read_close_twice_and_read_before_open():
    setup = device(gauge(0, const(100.0)), gauge(1, const(-50.0)), block=64)
    drv = _driver(setup, noise_nv_per_v=30.0, seed=5)
    with pytest.raises(DriverIOError):
        drv.read_block(0.1)
    expected = BridgeSimulator(setup, {"noise_nv_per_v": 30.0, "seed": 5}).codes(0, 128)[0]
    for _ in range(2):
        drv.open()
        b0, b1 = drv.read_block(1.0), drv.read_block(1.0)
        assert (b0.start_index, b0.seq, b1.start_index, b1.seq) == (0, 0, 64, 1)
        assert b0.data.shape == (64, 2) and b0.data.dtype == np.int32
        assert b0.quality.dtype == np.uint8 and b0.t0_ns is None and b0.device == "dev"
        assert b0.period_ns == 1_000_000 and b1.host_mono_ns >= b0.host_mono_ns > 0
        assert np.array_equal(np.concatenate([b0.data, b1.data]), expected)
        drv.close()
        drv.close()
    with pytest.raises(DriverIOError):
        drv.read_block(0.1)


def test_driver_shunt_starts_with_next_block():
    setup = device(gauge(0, const(0.0), shunt={"ohm": 174650.0, "arm": 1}), gauge(1, const(0.0)),
                   block=10)
    drv = _driver(setup)
    with pytest.raises(NotSupported):
        drv.set_shunt(1, True)
    drv.open()
    assert not drv.read_block(1).quality.any()
    drv.set_shunt(0, True)
    b = drv.read_block(1)
    assert np.all(b.quality[:, 0] == Quality.SHUNT_ON) and np.all(b.data[:, 0] < 0)
    assert any(e.kind == "shunt" for e in drv.drain_events())
    drv.close()


def test_realtime_pacing_and_overrun():
    setup = device(gauge(0, const(0.0)), rate_hz=100.0, block=20)
    drv = _driver(setup, realtime=True)
    drv.open()
    assert drv.read_block(0.001) is None          # last sample due 0.19 s after open
    block = drv.read_block(5.0)
    assert block is not None and block.start_index == 0
    drv.close()
    fast = _driver(device(gauge(0, const(0.0)), rate_hz=1000.0, block=10), realtime=True, fifo_s=0.05)
    fast.open()
    time.sleep(0.3)
    b = fast.read_block(1.0)
    assert b.start_index > 100 and np.all(b.quality[0] & Quality.AFTER_GAP)
    assert not np.any(b.quality[1:] & Quality.AFTER_GAP)
    assert fast.counters["samples_lost"] == b.start_index
    assert [e.kind for e in fast.drain_events()] == ["overrun"]
    fast.close()


def test_bad_options_name_their_key_path():
    with pytest.raises(ConfigError, match=r"devices\[0\]\.options\.noise_nv_per_v"):
        validate(SimulatedBridge.OPTIONS, {"noise_nv_per_v": -1.0}, "devices[0].options")
    with pytest.raises(ConfigError, match=r"options\.mains_hz"):
        validate(SimulatedBridge.OPTIONS, {"mains_hz": 55}, "devices[0].options")
    with pytest.raises(ConfigError, match=r"options\.colour"):
        validate(SimulatedBridge.OPTIONS, {"colour": "red"}, "devices[0].options")
    with pytest.raises(ConfigError, match=r"channels\[0\]\.options\.truth\.rate_per_s"):
        validate(SimulatedBridge.CHANNEL_OPTIONS, {"truth": {"kind": "ramp"}},
                 "devices[0].channels[0].options")
    with pytest.raises(ConfigError, match=r"options\.truth: give exactly one"):
        validate(SimulatedBridge.CHANNEL_OPTIONS,
                 {"truth": {"kind": "steps", "levels": [1], "step_s": 1, "times_s": [0]}}, "options")


def _bad_setup(channel2: ChannelSetup, **options: Any) -> str:
    setup = device(gauge(0, const(0.0)), gauge(1, const(0.0)), channel2)
    opts = validate(SimulatedBridge.OPTIONS, options)
    with pytest.raises(DriverConfigError) as err:
        SimulatedBridge.check_setup(setup, opts, "devices[0]")
    return err.value.path


def test_check_setup_names_the_key_path():
    good = gauge(2, const(0.0))
    bad_kind = ChannelSetup("ch2", 2, good.config, {"truth": {"kind": "zigzag"}})
    assert _bad_setup(bad_kind) == "devices[0].channels[2].options.truth.kind"
    no_truth = ChannelSetup("ch2", 2, good.config, {})
    assert _bad_setup(no_truth) == "devices[0].channels[2].options.truth"
    creep_load = transducer(2, {"kind": "creep", "elastic_microstrain": 1.0},
                            rated_output_mv_per_v=2.0, capacity=10.0)
    assert _bad_setup(creep_load) == "devices[0].channels[2].options.truth.kind"
    custom = gauge(2, const(0.0), bridge="custom")
    assert _bad_setup(custom) == "devices[0].channels[2].arms"
    assert _bad_setup(good, open_bridge_channels=["nope"]) == \
        "devices[0].options.open_bridge_channels[0]"
    many = device(*[gauge(i, const(0.0)) for i in range(33)])
    with pytest.raises(DriverConfigError, match=r"devices\[0\]\.channels"):
        SimulatedBridge.check_setup(many, validate(SimulatedBridge.OPTIONS, {}), "devices[0]")
    fast = device(gauge(0, const(0.0)), rate_hz=20000.0)
    with pytest.raises(DriverConfigError, match=r"devices\[0\]\.sample_rate_hz"):
        SimulatedBridge.check_setup(fast, validate(SimulatedBridge.OPTIONS, {}), "devices[0]")
    SimulatedBridge.check_setup(device(good), validate(SimulatedBridge.OPTIONS, {}), "devices[0]")
