"""Temperature channels (RTD, thermocouple) through configuration -> channel chain, and end to
end through `straind run` with the simulated front-end.

Oracles: the Pt100 table values of IEC 60751 (from memory, as listed in the project's
measurement notes), the quadratic Callendar-Van Dusen root computed here with numpy.roots, the
NIST Monograph 175 reference functions of the PyPI package thermocouples_reference (its inverse
by a bisection written here), and type K/J/T table values from the NIST ITS-90 tables (from
memory). Converter codes are made here from those values, never by the code under test.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from thermocouples_reference import thermocouples

from helpers import ServiceProcess, sim_device, write_config
from straind.block import CODE_MAX, Block, Quality
from straind.chain import DeviceChain
from straind.config import load_config_text
from straind.schema import ConfigError
from straind.store import read_events

FS = 2 ** 23
A, B = 3.9083e-3, -5.775e-7  # IEC 60751 Callendar-Van Dusen coefficients (from memory)

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
T0 = "options: {truth: {kind: constant, value: 20}}"


def _chain(channels_yaml: str, head: str = HEAD) -> DeviceChain:
    return DeviceChain(load_config_text(head + channels_yaml).devices[0])


def _block(codes: np.ndarray, quality: np.ndarray | None = None) -> Block:
    codes = np.asarray(codes, dtype=np.int32)
    if codes.ndim == 1:
        codes = codes[:, None]
    q = np.zeros(codes.shape, np.uint8) if quality is None else quality
    return Block("d", codes, q, 0, 10_000_000, 0, 0, 0, t0_ns=0)


def ref_emf_mv(tc_type: str, t_c) -> np.ndarray:
    """emf (mV, reference junction at 0 degC) from thermocouples_reference (NIST Monograph 175)."""
    return np.asarray(thermocouples[tc_type].emf_mVC(np.atleast_1d(np.asarray(t_c, float)),
                                                       Tref=np.zeros(1)))


def ref_temperature_c(tc_type: str, emf_mv, lo: float, hi: float) -> np.ndarray:
    """Bisection on thermocouples_reference's forward function (monotone on [lo, hi])."""
    e = np.atleast_1d(np.asarray(emf_mv, float))
    a, b = np.full(e.shape, lo), np.full(e.shape, hi)
    for _ in range(60):
        m = 0.5 * (a + b)
        above = ref_emf_mv(tc_type, m) > e
        a, b = np.where(above, a, m), np.where(above, m, b)
    return 0.5 * (a + b)


def cvd_ohm(t_c: float, r0: float) -> float:
    """Callendar-Van Dusen for T >= 0 degC, written out here (IEC 60751)."""
    return r0 * (1 + A * t_c + B * t_c * t_c)


# --------------------------------------------------------------------------- RTD, chain level

PT100 = """      - {name: t1, sensor: rtd, element: pt100, reference_ohm: 400, gain: 1,
         %s %s}
"""


@pytest.mark.parametrize("t_c,r_ohm", [
    # IEC 60751 Pt100 table (from memory, listed in the measurement notes)
    (-100.0, 60.2558), (0.0, 100.0), (100.0, 138.5055), (200.0, 175.8560), (300.0, 212.0515)])
def test_pt100_table_values(t_c: float, r_ohm: float) -> None:
    ch = _chain(PT100 % ("wiring: 4-wire,", T0))
    code = round(r_ohm / 400.0 * FS)  # ratiometric: full scale code = R_ref
    out = ch.convert(_block([code]))
    # one code is 400/2**23 ohm = 4.8e-5 ohm, about 1.2e-4 degC; the table has 1e-4 ohm
    assert out.values[0, 0] == pytest.approx(t_c, abs=4e-4)
    assert out.quality[0, 0] == 0 and out.units == ("degC",)


def test_pt1000_dense_against_quadratic_root_with_gain_override() -> None:
    # gain 2 on this channel (the device's adc says 128): full scale is R_ref / 2 = 2000 ohm
    ch = _chain("""      - {name: t1, sensor: rtd, element: pt1000, reference_ohm: 4000, gain: 2,
         wiring: 3-wire, lead_ohm: 3.0, %s}
""" % T0)
    codes = np.arange(FS // 2, FS - 1, 40_000)  # 1000 to 2000 ohm: 0 to about 274 degC
    r = codes / FS / 2 * 4000.0  # 3-wire: leads compensated, not subtracted
    # independent oracle: the smaller root of R/R0 = 1 + A T + B T^2 (T >= 0) by numpy.roots
    want = np.array([min(z.real for z in np.roots([B, A, 1 - x / 1000.0]) if z.real > -1e-9)
                     for x in r])
    got = ch.convert(_block(codes)).values[:, 0]
    np.testing.assert_allclose(got, want, atol=1e-9)
    assert ch.ratio_per_code[0] == pytest.approx(1 / (FS * 2))


def test_two_wire_rtd_subtracts_both_leads() -> None:
    ch = _chain(PT100 % ("wiring: 2-wire, lead_ohm: 0.75,", T0))
    r = cvd_ohm(150.0, 100.0) + 2 * 0.75  # both leads in series with the element
    out = ch.convert(_block([round(r / 400 * FS)]))
    assert out.values[0, 0] == pytest.approx(150.0, abs=4e-4)
    # the same code read as 4-wire is 1.5 ohm (about 4 degC) hotter
    four = _chain(PT100 % ("wiring: 4-wire, lead_ohm: 0.75,", T0)).convert(
        _block([round(r / 400 * FS)])).values[0, 0]
    assert four - 150.0 == pytest.approx(1.5 / (100 * (A + 2 * B * 150)), rel=0.01)


def test_rtd_out_of_range_and_saturation_flagged() -> None:
    ch = _chain(PT100 % ("wiring: 4-wire,", T0))
    out = ch.convert(_block([100, CODE_MAX]))  # 0.005 ohm: far below -200 degC (18.5 ohm)
    assert np.isnan(out.values[:, 0]).all()
    assert out.quality[0, 0] & Quality.OUT_OF_RANGE
    assert out.quality[1, 0] & Quality.SATURATED


# ------------------------------------------------------------------- thermocouple, chain level

TC_HEAD = HEAD.replace("adc: {gain: 128}", "adc: {gain: 128, reference: external, vref_v: 2.5}")


@pytest.mark.parametrize("tc_type,t_c,emf_mv", [
    # NIST ITS-90 thermocouple tables (from memory), reference junction at 0 degC
    ("K", 100.0, 4.096), ("K", 500.0, 20.644), ("J", 100.0, 5.269), ("T", 100.0, 4.279)])
def test_thermocouple_table_values_fixed_junction(tc_type: str, t_c: float, emf_mv: float) -> None:
    ch = _chain("""      - {name: tc, sensor: thermocouple, type: %s, junction_c: 0, gain: 32, %s}
""" % (tc_type, T0), TC_HEAD)
    # emf = code / (2**23 G) * vref
    code = round(emf_mv * 1e-3 / 2.5 * FS * 32)
    got = ch.convert(_block([code])).values[0, 0]
    # the table prints 1 uV: about 0.025 degC for these types
    assert got == pytest.approx(t_c, abs=0.03)


def test_thermocouple_cold_junction_from_rtd_channel() -> None:
    # the thermocouple comes first in the channel list; its junction RTD after it
    ch = _chain("""      - {name: tc, sensor: thermocouple, type: K, junction_channel: cj, gain: 64, %s}
      - {name: cj, sensor: rtd, element: pt100, reference_ohm: 400, gain: 1, reference: excitation,
         %s}
""" % (T0, T0), TC_HEAD)
    t_hot = np.array([-150.0, 20.0, 235.5, 412.0, 900.0])
    t_cold = np.array([18.0, 25.0, 31.5, 22.0, 40.0])
    # thermocouples_reference: E(T) - E(Tj) at the terminals
    emf = ref_emf_mv("K", t_hot) - ref_emf_mv("K", t_cold)
    tc_codes = np.round(emf * 1e-3 / 2.5 * FS * 64)
    cj_codes = np.round([cvd_ohm(t, 100.0) / 400 * FS for t in t_cold])
    out = ch.convert(_block(np.stack([tc_codes, cj_codes], axis=1)))
    np.testing.assert_allclose(out.values[:, 1], t_cold, atol=4e-4)
    # one code is 2.5/(64 * 2**23) V = 4.7 nV, about 1.2e-4 degC; the RTD adds its own 1e-4
    np.testing.assert_allclose(out.values[:, 0], t_hot, atol=2e-3)
    # against the oracle's inverse of the quantised emf (bisection on the package's function)
    want = ref_temperature_c("K", tc_codes / FS / 64 * 2.5e3 + ref_emf_mv("K", out.values[:, 1]),
                             -200.0, 1372.0)
    np.testing.assert_allclose(out.values[:, 0], want, atol=1e-6)


def test_thermocouple_inherits_junction_quality() -> None:
    ch = _chain("""      - {name: cj, sensor: rtd, element: pt100, reference_ohm: 400, gain: 1,
         reference: excitation, %s}
      - {name: tc, sensor: thermocouple, type: K, junction_channel: cj, %s}
""" % (T0, T0), TC_HEAD)
    codes = np.array([[round(cvd_ohm(25.0, 100) / 400 * FS), 5000],
                      [CODE_MAX, 5000]])
    out = ch.convert(_block(codes))
    assert np.isfinite(out.values[0]).all()
    assert np.isnan(out.values[1]).all()
    assert out.quality[1, 1] & Quality.SATURATED  # unusable junction: unusable thermocouple


# ----------------------------------------------------------------------------- configuration

def _bad(channels_yaml: str, head: str = HEAD) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_config_text(head + channels_yaml)
    return info.value


def test_config_rules_of_temperature_channels() -> None:
    # no excitation_v is needed for an RTD
    cfg = load_config_text(HEAD + PT100 % ("", T0))
    ch = cfg.devices[0]["channels"][0]
    assert ch["excitation_v"] is None and ch["wiring"] == "4-wire" and ch["unit"] == "degC"
    # tare does not apply: the key is refused
    err = _bad(PT100 % ("tare: {at_start: true},", T0))
    assert err.path == "devices[0].channels[0].tare" and "unknown key" in str(err)
    # an RTD is ratiometric
    err = _bad(PT100 % ("reference: external, vref_v: 2.5,", T0))
    assert err.path == "devices[0].channels[0].reference"
    # a thermocouple needs an external reference with a voltage
    err = _bad("      - {name: tc, sensor: thermocouple, type: K, junction_c: 20, %s}\n" % T0)
    assert err.path == "devices[0].channels[0].vref_v" and "external" in str(err)
    err = _bad("      - {name: tc, sensor: thermocouple, type: K, junction_c: 20, "
               "reference: excitation, %s}\n" % T0)
    assert err.path == "devices[0].channels[0].reference"
    # exactly one cold junction, and it must be a temperature channel of the device
    err = _bad("      - {name: tc, sensor: thermocouple, type: K, junction_c: 20, "
               "junction_channel: x, vref_v: 2.5, %s}\n" % T0)
    assert err.path == "devices[0].channels[0].junction_channel"
    err = _bad("""      - {name: tc, sensor: thermocouple, type: K, junction_channel: g, vref_v: 2.5, %s}
      - {name: g, sensor: strain_gauge, gauge_factor: 2, gauge_ohm: 350, bridge: quarter,
         excitation_v: 5, %s}
""" % (T0, T0))
    assert err.path == "devices[0].channels[0].junction_channel" and "strain_gauge" in str(err)
    err = _bad("      - {name: tc, sensor: thermocouple, type: Q, junction_c: 0, vref_v: 2, %s}\n" % T0)
    assert err.path == "devices[0].channels[0].type"
    # excitation stays required where it means something
    err = _bad("      - {name: g, sensor: strain_gauge, gauge_factor: 2, gauge_ohm: 350, "
               "bridge: quarter, %s}\n" % T0)
    assert err.path == "devices[0].channels[0].excitation_v"


def test_check_prints_temperature_rows(tmp_path: Path) -> None:
    p = tmp_path / "t.yaml"
    p.write_text(TC_HEAD + PT100 % ("reference: excitation,", T0)
                 + "      - {name: tc, sensor: thermocouple, type: K, junction_channel: t1, "
                 "gain: 64, %s}\n" % T0)
    r = subprocess.run([sys.executable, "-m", "straind.cli", "check", "-c", str(p)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    rows = {line.split()[1]: line.split() for line in r.stdout.splitlines()
            if line.startswith("d ")}
    assert rows["t1"][2] == "rtd" and rows["t1"][-1] == "degC"
    # Pt100 against 400 ohm at gain 1 reaches the whole -200..850 degC span of IEC 60751
    assert float(rows["t1"][-4]) == pytest.approx(-200.0, abs=0.05)
    assert float(rows["t1"][-3]) == pytest.approx(850.0, abs=0.05)
    assert "type" in rows["tc"] and "K," in rows["tc"]
    # type K at gain 64, 2.5 V: full scale 39.06 mV is about 944 degC (NIST table, from memory)
    assert float(rows["tc"][-3]) == pytest.approx(944.0, abs=2.0)


# ------------------------------------------------------------------------------ end to end

def test_end_to_end_constant_temperatures(tmp_path: Path) -> None:
    chans = [
        {"name": "spec", "sensor": "rtd", "element": "pt100", "reference_ohm": 400, "gain": 1,
         "wiring": "2-wire", "lead_ohm": 0.5, "reference": "excitation",
         "options": {"truth": {"kind": "constant", "value": 87.3}}},
        {"name": "cj", "sensor": "rtd", "element": "pt1000", "reference_ohm": 4000, "gain": 1,
         "wiring": "3-wire", "lead_ohm": 2.0, "reference": "excitation",
         "options": {"truth": {"kind": "constant", "value": 26.4}}},
        {"name": "furnace", "sensor": "thermocouple", "type": "K", "junction_channel": "cj",
         "gain": 64, "options": {"truth": {"kind": "constant", "value": 412.0}}},
        {"name": "flue", "sensor": "thermocouple", "type": "J", "junction_c": 20.0, "gain": 32,
         "vref_v": 1.25, "options": {"truth": {"kind": "constant", "value": 95.0}}},
    ]
    dev = sim_device(chans, rate_hz=200, noise_nv_per_v=20)
    dev["adc"] = {"gain": 128, "reference": "external", "vref_v": 2.5}
    cfg = write_config(tmp_path, [dev])
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        st = svc.wait_ready(samples=400)
        vals = st["devices"]["dev0"]["last_values"]
        assert vals["spec"] == pytest.approx(87.3, abs=0.01)
        # temperature channels have no zero: a tare is refused with a clear message
        r = subprocess.run([sys.executable, "-m", "straind.cli", "tare", "furnace", "-c", str(cfg)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 3 and "temperature channel" in r.stderr
        time.sleep(0.3)
        assert svc.terminate() == 0
    seg = sorted((tmp_path / "data").glob("*.h5"))[0]
    with h5py.File(seg, "r") as f:
        d = f["devices/dev0"]
        v = d["value"][:]
        assert v.shape[1] == 4 and d["raw"].shape[1] == 4
        means, std = v.mean(axis=0), v.std(axis=0)
        # the simulated truths read back; noise 20 nV/V of the reference is 8e-6 ohm on the
        # Pt100 (2e-5 degC) and 50 nV on the thermocouple (about 1e-3 degC)
        assert means[0] == pytest.approx(87.3, abs=1e-3)
        assert means[1] == pytest.approx(26.4, abs=1e-3)
        assert means[2] == pytest.approx(412.0, abs=2e-3)
        assert means[3] == pytest.approx(95.0, abs=2e-3)
        assert std[2] > 1e-4  # the noise is there
        attrs = d["channels/furnace"].attrs
        assert attrs["sensor"] == "thermocouple" and attrs["unit"] == "degC"
        assert attrs["junction_channel"] == "cj" and attrs["gain"] == 64
        assert d["channels/spec"].attrs["wiring"] == "2-wire"
        assert "zero_ratio" not in d["channels/spec"].attrs
        kinds = [e.kind for e in read_events(f)]
        assert "tare" not in kinds
