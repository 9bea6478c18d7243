"""Temperature effects on gauges and gauge models through the chain: thermal output removed in
software, dummy-gauge compensation left alone, gauge factor drift GF(T), transverse pairs,
semiconductor gauges (GF2) and gauge-factor plausibility warnings; end to end with a tare, a
shunt calibration at temperature and the state file.

Oracles: the simulated front-end's own truth (temperature and mechanical strain) put through the
thermal output polynomial and gauge-factor law evaluated here with numpy
(eps_app(T) = A0 + A1 T + ... + A4 T^4 at GF_ref, scaled by GF_ref / GF; GF(T) = GF (1 + alpha
(T - T_ref)): Window, Strain Gauge Technology, 2nd ed.), and the transverse-sensitivity forward
model of ASTM E251 written out here.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from helpers import ServiceProcess, sim_device, write_config
from straind.block import Block
from straind.chain import DeviceChain
from straind.config import config_warnings, load_config_text
from straind.drivers.simulated import BridgeSimulator
from straind.schema import ConfigError
from straind.store import read_events
from straind.supervisor import device_setup

# an invented data-sheet thermal output polynomial (microstrain, T in degC) at GF_ref 2.0
COEFFS = [-31.5, 2.21, -0.0412, 1.62e-4, -2.1e-7]
GF_REF, GF = 2.0, 2.1
SIM_COEFFS = [c * GF_REF / GF for c in COEFFS]  # as indicated at the gauge's own factor
NU0 = 0.285  # ASTM E251


def poly(t: np.ndarray, c: list[float]) -> np.ndarray:
    return sum(a * np.asarray(t, float) ** i for i, a in enumerate(c))


def gauge(name: str, truth: float | dict, options: dict | None = None, **kw) -> dict:
    t = truth if isinstance(truth, dict) else {"kind": "constant", "value": float(truth)}
    ch = {"name": name, "sensor": "strain_gauge", "gauge_factor": GF, "gauge_ohm": 350,
          "bridge": "quarter", "excitation_v": 5.0, "options": {"truth": t, **(options or {})}}
    ch.update(kw)
    return ch


def rtd(name: str, truth: dict) -> dict:
    return {"name": name, "sensor": "rtd", "element": "pt100", "reference_ohm": 400, "gain": 1,
            "options": {"truth": truth}}


def chain_blocks(chans: list[dict], blocks: int = 10, n: int = 100, rate_hz: float = 200.0):
    """Simulated codes of a device (through BridgeSimulator) converted block by block."""
    dev = sim_device(chans, rate_hz=rate_hz, noise_nv_per_v=20)
    cfg = load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                           "devices": [dev]}))
    d = cfg.devices[0]
    sim = BridgeSimulator(device_setup(d), d["options"])
    chain = DeviceChain(d)
    notes: list[tuple] = []
    chain.on_note = lambda *a: notes.append(a)
    period = int(1e9 / rate_hz)
    out = []
    for k in range(blocks):
        codes, q = sim.codes(k * n, n)
        out.append(chain.convert(Block("dev0", codes, q, k * n, period, k, 0, 0,
                                       t0_ns=k * n * period)))
    values = np.concatenate([e.values for e in out])
    quality = np.concatenate([e.quality for e in out])
    truth = sim.truth(0, blocks * n)
    return chain, values, quality, truth, notes


SWING = {"kind": "sine", "offset": 80.0, "amplitude": 60.0, "frequency_hz": 0.5}


def test_temperature_swing_thermal_output_removed() -> None:
    software = {"compensation": "software", "temperature_channel": "tg",
                "thermal_output": {"coefficients": COEFFS, "gauge_factor_ref": GF_REF}}
    sim_thermal = {"thermal_output_microstrain": SIM_COEFFS, "temperature_from": "tg"}
    chans = [rtd("tg", SWING),
             gauge("comp", 250.0, sim_thermal, thermal=software),
             gauge("plain", 250.0, sim_thermal),                           # uncompensated
             gauge("dummy", 250.0, thermal={"compensation": "dummy-gauge",
                                            "temperature_channel": "tg"})]
    chain, v, q, truth, notes = chain_blocks(chans)
    t_true = truth[:, 0]
    assert np.ptp(t_true) > 100  # a real swing: 20 to 140 degC
    assert np.abs(v[:, 0] - t_true).max() < 1e-3  # the RTD reads it (4-wire, 400 ohm, gain 1)
    # no tare yet: the reference temperature is the first block's mean, announced once
    assert [n[0] for n in notes] == ["thermal_reference"]
    t_zero = notes[0][2]["temperature_at_zero_c"]
    assert notes[0][1] == "comp" and notes[0][3] == {"temperature_at_zero_c": t_zero}
    assert t_zero == pytest.approx(t_true[:100].mean(), abs=1e-3)
    app = poly(t_true, SIM_COEFFS)  # what the gauge shows at its own gauge factor
    # uncompensated: follows the thermal output polynomial (tens of microstrain of swing)
    assert np.ptp(app) > 50
    np.testing.assert_allclose(v[:, 2], 250.0 + app, atol=0.2)
    # compensated: the mechanical strain, plus the (fixed) thermal output at T_zero, within noise
    want = 250.0 + poly(t_zero, SIM_COEFFS)
    assert np.abs(v[:, 1] - want).max() < 0.2
    assert abs(v[:, 1].mean() - want) < 0.01
    # dummy-gauge compensation is declared: never corrected again
    assert np.abs(v[:, 3] - 250.0).max() < 0.2
    # the temperature channel's quality is part of the compensated gauge's
    assert (q[:, 1] == 0).all()


def test_gauge_factor_drift_corrected() -> None:
    drift = {"temperature_from": "tg", "gf_alpha_per_c": 2e-4, "gf_ref_temp_c": 24.0}
    chans = [rtd("tg", SWING),
             gauge("gft", 1000.0, drift, thermal={"compensation": "none",
                                                  "temperature_channel": "tg",
                                                  "gf_alpha_per_c": 2e-4, "gf_ref_temp_c": 24}),
             gauge("raw", 1000.0, drift)]
    chain, v, q, truth, notes = chain_blocks(chans)
    t_true = truth[:, 0]
    # without the correction the reading follows GF(T)/GF = 1 + alpha (T - T_ref)
    np.testing.assert_allclose(v[:, 2], 1000.0 * (1 + 2e-4 * (t_true - 24.0)), atol=0.2)
    assert np.ptp(v[:, 2]) > 20
    # corrected: the mechanical strain
    assert np.abs(v[:, 1] - 1000.0).max() < 0.2
    assert notes == []  # no thermal output polynomial: no temperature reference is needed
    # a step of the gauge's own reading is scaled by GF / GF(T) at the last block's temperature
    t_last = t_true[-100:].mean()
    assert chain.step_factor(1) == pytest.approx(1 / (1 + 2e-4 * (t_last - 24.0)), rel=1e-6)
    assert chain.step_factor(2) == 1.0


def test_transverse_pair_and_semiconductor_gauge() -> None:
    ea, eb, kt = 600.0, -180.0, 0.03
    # ASTM E251: a gauge indicates (eps_axial + Kt eps_transverse) / (1 - nu0 Kt)
    ha = (ea + kt * eb) / (1 - NU0 * kt)
    hb = (eb + kt * ea) / (1 - NU0 * kt)
    chans = [gauge("ta", ha, transverse={"kt": kt, "pair": "tb"}),
             gauge("tb", hb, transverse={"kt": kt, "pair": "ta"}),
             gauge("tu", ha),
             # p-type silicon: dR/R = GF eps + GF2 eps^2; gain 16 on this channel for its range
             gauge("semi", 300.0, gauge_factor=110.0, gauge_factor_2=3500.0,
                   gauge_type="p-silicon", gain=16)]
    chain, v, q, truth, notes = chain_blocks(chans, blocks=4)
    assert v[:, 0].mean() == pytest.approx(ea, abs=0.01)
    assert v[:, 1].mean() == pytest.approx(eb, abs=0.01)
    assert v[:, 2].mean() == pytest.approx(ha, abs=0.01)  # no pair declared: as read
    # the quadratic term is about 2.9 microstrain here; the exact inverse removes it
    assert v[:, 3].mean() == pytest.approx(300.0, abs=0.01)
    assert 3 in chain._func_cols and 0 in chain._mobius_cols  # fast path kept for the rest
    assert chain.ratio_per_code[3] == pytest.approx(1 / (2 ** 23 * 16))
    assert chain.step_factor(0) == pytest.approx((1 - NU0 * kt) / (1 - kt * kt))


def _cfg(chans: list[dict]) -> object:
    return load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                            "devices": [sim_device(chans)]}))


def _bad(chans: list[dict]) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        _cfg(chans)
    return info.value


def test_configuration_rules() -> None:
    t = rtd("tg", {"kind": "constant", "value": 20})
    sw = {"compensation": "software", "temperature_channel": "tg",
          "thermal_output": {"coefficients": COEFFS, "gauge_factor_ref": 2.0}}
    # software compensation on a bridge whose adjacent-arm gauges already cancel it
    err = _bad([t, gauge("g", 0, bridge="half-bending", thermal=sw)])
    assert err.path == "devices[0].channels[1].thermal.compensation" and "twice" in str(err)
    # a dummy gauge with a thermal output polynomial would correct twice as well
    err = _bad([t, gauge("g", 0, thermal={**sw, "compensation": "dummy-gauge"})])
    assert err.path == "devices[0].channels[1].thermal.thermal_output" and "twice" in str(err)
    err = _bad([t, gauge("g", 0, thermal={"compensation": "software", "temperature_channel": "tg"})])
    assert err.path == "devices[0].channels[1].thermal.thermal_output"
    err = _bad([t, gauge("g", 0, thermal={**sw, "temperature_channel": "h"}), gauge("h", 0)])
    assert err.path == "devices[0].channels[1].thermal.temperature_channel"
    err = _bad([t, gauge("g", 0, thermal={"compensation": "none", "gf_alpha_per_c": 1e-4})])
    assert err.path == "devices[0].channels[1].thermal.temperature_channel"
    # transverse pairs are declared on both gauges with the same Kt
    err = _bad([gauge("a", 0, transverse={"kt": 0.02, "pair": "b"}), gauge("b", 0)])
    assert err.path == "devices[0].channels[0].transverse.pair" and "both" in str(err)
    err = _bad([gauge("a", 0, transverse={"kt": 0.02, "pair": "b"}),
                gauge("b", 0, transverse={"kt": 0.03, "pair": "a"})])
    assert err.path == "devices[0].channels[0].transverse.pair"
    err = _bad([gauge("a", 0, transverse={"kt": 1.2, "pair": "b"}), gauge("b", 0)])
    assert err.path == "devices[0].channels[0].transverse.kt"
    err = _bad([gauge("a", 0, gauge_type="unobtainium")])
    assert err.path == "devices[0].channels[0].gauge_type"
    # a plausibility warning, not an error: a Cu-Ni foil gauge with GF 2.6
    cfg = _cfg([gauge("a", 0, gauge_type="cu-ni-foil", gauge_factor=2.6),
                gauge("b", 0, gauge_type="cu-ni-foil", gauge_factor=2.05)])
    w = config_warnings(cfg.data)
    assert len(w) == 1 and "dev0/a" in w[0] and "2 to 2.1" in w[0]


def test_end_to_end_tare_temperature_and_shunt_cal_at_temperature(tmp_path: Path) -> None:
    alpha = 2e-4
    chans = [rtd("tg", {"kind": "ramp", "start": 24.0, "rate_per_s": 50.0, "start_s": 1.5,
                        "until_s": 3.5}),
             gauge("spec", {"kind": "steps", "initial": 0.0, "levels": [300.0], "times_s": [2.0]},
                   {"thermal_output_microstrain": SIM_COEFFS, "temperature_from": "tg",
                    "gf_alpha_per_c": alpha},
                   gauge_type="ni-cr-foil", gauge_factor=2.6, tare={"at_start": True},
                   shunt={"ohm": 174650, "arm": 1},
                   thermal={"compensation": "software", "temperature_channel": "tg",
                            "thermal_output": {"coefficients": COEFFS, "gauge_factor_ref": GF_REF},
                            "gf_alpha_per_c": alpha, "gf_ref_temp_c": 24.0})]
    # the simulated gauge has GF 2.6 too, so its thermal output at its factor is scaled to 2.6
    chans[1]["options"]["thermal_output_microstrain"] = [c * GF_REF / 2.6 for c in COEFFS]
    cfg = write_config(tmp_path, [sim_device(chans, rate_hz=200, noise_nv_per_v=20)])
    r = subprocess.run([sys.executable, "-m", "straind.cli", "check", "-c", str(cfg)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and "warning: devices[0].channels[1].gauge_factor" in r.stdout
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=4 * 200)
        assert "ni-cr-foil" in svc.log() and "level=warning" in svc.log()
        st = svc.command("status")["devices"]["dev0"]
        assert st["last_values"]["tg"] == pytest.approx(124.0, abs=0.01)
        assert st["last_values"]["spec"] == pytest.approx(300.0, abs=0.3)
        # the shunt step at 124 degC, after the GF(T) correction, is what the chain expects
        res = svc.command("shunt-cal", {"channel": "spec", "seconds": 0.5}, timeout_s=60)
        res = res["dev0/spec"]
        assert res["gain"] == pytest.approx(1.0, abs=2e-4)
        # oracle (Window, Strain Gauge Technology: shunt calibration): the active arm at its
        # present resistance R1 = Rg (1 + x), x = GF(T) eps_mech + GF_ref eps_app(T), shunted by
        # Rs; a quarter bridge without leads indicates dR1 / (Rg GF), then GF / GF(T) applies
        x = 2.6 * (1 + alpha * 100) * 300e-6 + GF_REF * poly(124.0, COEFFS) * 1e-6
        r1 = 350 * (1 + x)
        step = (r1 * 174650 / (r1 + 174650) - r1) / (350 * 2.6) * 1e6 / (1 + alpha * 100)
        assert res["expected_microstrain"] == pytest.approx(step, rel=1e-4)
        time.sleep(0.3)
        assert svc.terminate() == 0
    state = json.loads((tmp_path / "data" / "straind-state.json").read_text())
    spec = state["channels"]["dev0/spec"]
    assert spec["temperature_at_zero_c"] == pytest.approx(24.0, abs=1e-3)
    assert spec["zero_origin"] == "at_start"
    seg = sorted((tmp_path / "data").glob("*.h5"))[0]
    with h5py.File(seg, "r") as f:
        d = f["devices/dev0"]
        v, t = d["value"][:], d["time_ns"][:]
        q = d["quality"][:]
        events = read_events(f)
        attrs = d["channels/spec"].attrs
        assert attrs["thermal_compensation"] == "software"
        assert attrs["temperature_channel"] == "tg"
    kinds = [e.kind for e in events]
    assert kinds.index("thermal_reference") < kinds.index("tare")
    tare = [e for e in events if e.kind == "tare"][0]
    assert tare.detail["temperature_at_zero_c"] == pytest.approx(24.0, abs=1e-3)
    # from 3.5 s on: 124 degC, 300 microstrain mechanical. The thermal output changed by
    # eps_app(124) - eps_app(24) (about -130 microstrain) and the gauge factor by 2 %: both removed
    hot = (t >= t[0] + int(3.6e9)) & ((q[:, 1] & 64) == 0)
    assert hot.sum() > 50
    change = poly(124.0, COEFFS) - poly(24.0, COEFFS)
    assert abs(change) > 100
    assert np.abs(v[hot, 1] - 300.0).max() < 0.3
