"""Derived columns (rosettes, uniaxial stress, creep strain and rate): simulated front-end ->
channel chain -> derived columns, and end to end through `straind run` into HDF5.

Oracles: the rosette gauges are fed the forward model of a known plane strain tensor, written
out here (eps(t) = ex cos^2 t + ey sin^2 t + gxy sin t cos t, Dally & Riley, Experimental Stress
Analysis, 4th ed.; transverse sensitivity as ASTM E251 defines Kt); principal strains and
directions come from numpy.linalg.eigh of the tensor; stresses from numpy.linalg.solve of the
plane-stress compliance matrix (Hooke's law), steel E = 200 GPa, nu = 0.3 (common practice).
The creep rate is compared with the slope of the simulated secondary stage.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

from helpers import ServiceProcess, sim_device, write_config
from straind.block import CODE_MAX, Quality
from straind.chain import DeviceChain
from straind.config import load_config_text
from straind.drivers.simulated import BridgeSimulator
from straind.schema import ConfigError
from straind.store import read_events
from straind.supervisor import device_setup

NU0 = 0.285  # ASTM E251


def gauge(name: str, truth: float | dict, **kw) -> dict:
    t = truth if isinstance(truth, dict) else {"kind": "constant", "value": float(truth)}
    ch = {"name": name, "sensor": "strain_gauge", "gauge_factor": 2.05, "gauge_ohm": 350,
          "bridge": "quarter", "excitation_v": 5.0, "lead_ohm": 0.3, "options": {"truth": t}}
    ch.update(kw)
    return ch


def reading(ex: float, ey: float, gxy: float, deg: float, kt: float = 0.0) -> float:
    """What a gauge at `deg` indicates (forward model written out here)."""
    def normal(t: float) -> float:
        c, s = math.cos(t), math.sin(t)
        return ex * c * c + ey * s * s + gxy * s * c
    t = math.radians(deg)
    return (normal(t) + kt * normal(t + math.pi / 2)) / (1 - NU0 * kt)


def run_chain(devices: list[dict], n: int = 400, derived: list | None = None,
              extra: str = "") -> tuple[DeviceChain, object]:
    dev = sim_device(devices, rate_hz=200, noise_nv_per_v=20)
    if derived is not None:
        dev["derived"] = derived
    doc = {"station": {"id": "s"}, "storage": {"path": "/tmp/unused"}, "devices": [dev]}
    cfg = load_config_text(yaml.safe_dump(doc) + extra)
    d = cfg.devices[0]
    sim = BridgeSimulator(device_setup(d), d["options"])
    codes, q = sim.codes(0, n)
    from straind.block import Block
    block = Block("dev0", codes, q, 0, 5_000_000, 0, 0, 0, t0_ns=1_000_000_000)
    chain = DeviceChain(d)
    return chain, chain.convert(block)


def compliance_stress(e1: float, e2: float, e_mpa: float, nu: float) -> np.ndarray:
    """Plane stress from principal strains by solving e = S s (Hooke's law), microstrain in."""
    s = np.array([[1.0, -nu], [-nu, 1.0]]) / e_mpa
    return np.linalg.solve(s, np.array([e1, e2]) * 1e-6)


@pytest.mark.parametrize("angles,layout,kt", [
    ((0.0, 45.0, 90.0), "rectangular", 0.0),
    ((0.0, 60.0, 120.0), "delta", 0.0),
    ((15.0, 75.0, 135.0), None, 0.0),
    ((0.0, 45.0, 90.0), "rectangular", 0.02),
])
def test_rosette_matches_eigh_of_the_tensor(angles, layout, kt) -> None:
    ex, ey, gxy = 420.0, -150.0, 300.0
    chans = [gauge(n, reading(ex, ey, gxy, a, kt)) for n, a in zip("abc", angles)]
    ros = {"name": "r", "kind": "rosette", "gauges": ["a", "b", "c"], "kt": kt,
           "material": {"e_mpa": 200000, "poisson": 0.3}}
    if layout:
        ros["layout"] = layout
    else:
        ros["angles_deg"] = list(angles)
    chain, eng = run_chain(chans, derived=[ros])
    names = list(eng.names)
    assert names[3:] == ["r_e1", "r_e2", "r_theta_deg", "r_gamma_max", "r_s1", "r_s2",
                         "r_von_mises", "r_tresca"]
    mean = dict(zip(names, eng.values.mean(axis=0)))
    # numpy.linalg.eigh of the strain tensor (tensor shear = gxy / 2)
    w, v = np.linalg.eigh(np.array([[ex, gxy / 2], [gxy / 2, ey]]))
    e2, e1 = w
    major = v[:, 1]
    theta = math.degrees(math.atan2(major[1], major[0]))
    theta = (theta + 90.0) % 180.0 - 90.0  # direction, in (-90, 90]
    # simulated noise of 20 nV/V is about 0.04 microstrain per sample; means over 400 samples
    assert mean["r_e1"] == pytest.approx(e1, abs=0.02)
    assert mean["r_e2"] == pytest.approx(e2, abs=0.02)
    assert mean["r_gamma_max"] == pytest.approx(e1 - e2, abs=0.03)
    assert mean["r_theta_deg"] == pytest.approx(theta, abs=0.01)
    s1, s2 = compliance_stress(e1, e2, 200000.0, 0.3)
    assert mean["r_s1"] == pytest.approx(s1, abs=0.01)
    assert mean["r_s2"] == pytest.approx(s2, abs=0.01)
    # von Mises of plane stress (common practice), Tresca = largest principal difference
    assert mean["r_von_mises"] == pytest.approx(math.sqrt(s1 * s1 - s1 * s2 + s2 * s2), abs=0.01)
    assert mean["r_tresca"] == pytest.approx(max(abs(s1 - s2), abs(s1), abs(s2)), abs=0.01)
    assert eng.units[3:7] == ("microstrain", "microstrain", "degree", "microstrain")
    assert set(eng.units[7:]) == {"MPa"}
    lay = chain.channel_layouts()
    assert [c.measured for c in lay] == [True] * 3 + [False] * 8
    assert lay[5].attrs["derived_kind"] == "rosette" and lay[5].attrs["inputs"] == "a,b,c"


def test_uniaxial_stress_and_quality_propagation() -> None:
    chans = [gauge("a", 300.0), gauge("b", 100.0), gauge("c", -80.0),
             gauge("g", 500.0, shunt={"ohm": 174650, "arm": 1}), gauge("o", 50.0)]
    derived = [{"name": "r", "kind": "rosette", "gauges": ["a", "b", "c"], "layout": "rectangular"},
               {"name": "sigma", "kind": "uniaxial_stress", "gauge": "g", "e_mpa": 200000},
               {"name": "cr", "kind": "creep", "gauge": "g", "window_s": 1.0},
               {"name": "so", "kind": "uniaxial_stress", "gauge": "o", "e_mpa": 200000}]
    dev = sim_device(chans, rate_hz=200, noise_nv_per_v=20, open_bridge_channels=["o"])
    dev["derived"] = derived
    cfg = load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                           "devices": [dev]}))
    d = cfg.devices[0]
    sim = BridgeSimulator(device_setup(d), d["options"])
    sim.set_shunt(3, True, from_index=100)
    codes, q = sim.codes(0, 200)
    codes[50, 1] = CODE_MAX  # one saturated sample on gauge b
    from straind.block import Block
    eng = DeviceChain(d).convert(Block("dev0", codes, q, 0, 5_000_000, 0, 0, 0, t0_ns=0))
    col = {n: i for i, n in enumerate(eng.names)}
    # Hooke, uniaxial: sigma = E eps (common practice), before the shunt goes on
    assert eng.values[:100, col["sigma"]].mean() == pytest.approx(200000 * 500e-6, abs=0.004)
    # b's saturated sample is ORed into every rosette output at that row only, and is NaN there
    for name in ("r_e1", "r_e2", "r_theta_deg", "r_gamma_max"):
        assert eng.quality[50, col[name]] == Quality.SATURATED
        assert np.isnan(eng.values[50, col[name]])
        assert (np.delete(eng.quality[:, col[name]], 50) == 0).all()
        assert np.isfinite(np.delete(eng.values[:, col[name]], 50)).all()
    # the open bridge of gauge o makes its stress unusable, with o's bits
    assert np.isnan(eng.values[:, col["so"]]).all()
    assert (eng.quality[:, col["so"]] & Quality.OPEN_BRIDGE).all()
    # the shunt bit of g reaches its stress and creep columns; the creep rate skips those samples
    for name in ("sigma", "cr_strain", "cr_rate"):
        assert (eng.quality[100:, col[name]] & Quality.SHUNT_ON).all()
        assert not (eng.quality[:100, col[name]] & Quality.SHUNT_ON).any()
    assert np.isnan(eng.values[100:, col["cr_rate"]]).all()


def _bad(dev_patch: dict) -> ConfigError:
    dev = sim_device([gauge("g", 0.0), gauge("r_e1", 0.0), gauge("x", 0.0), gauge("y", 0.0),
                      {"name": "lc", "sensor": "bridge_transducer", "quantity": "force",
                       "unit": "kN", "rated_output_mv_per_v": 2, "capacity": 10,
                       "excitation_v": 5, "options": {"truth": {"kind": "constant", "value": 0}}}])
    dev.update(dev_patch)
    with pytest.raises(ConfigError) as info:
        load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                         "devices": [dev]}))
    return info.value


def test_name_collisions_and_bad_inputs_rejected() -> None:
    err = _bad({"derived": [{"name": "r", "kind": "rosette", "gauges": ["g", "x", "y"],
                             "layout": "rectangular"}]})
    assert err.path == "devices[0].derived[0].name" and "r_e1" in str(err)
    assert "collides" in str(err)
    err = _bad({"derived": [{"name": "s", "kind": "uniaxial_stress", "gauge": "g", "e_mpa": 1e5},
                            {"name": "s", "kind": "uniaxial_stress", "gauge": "x", "e_mpa": 1e5}]})
    assert err.path == "devices[0].derived[1].name"
    err = _bad({"derived": [{"name": "c", "kind": "creep", "gauge": "lc", "window_s": 10}]})
    assert err.path == "devices[0].derived[0].gauge" and "not a strain value" in str(err)
    err = _bad({"derived": [{"name": "c", "kind": "creep", "gauge": "nope", "window_s": 10}]})
    assert err.path == "devices[0].derived[0].gauge" and "no such channel" in str(err)
    err = _bad({"derived": [{"name": "q", "kind": "rosette", "gauges": ["g", "x", "y"]}]})
    assert err.path == "devices[0].derived[0].layout"
    err = _bad({"derived": [{"name": "q", "kind": "rosette", "gauges": ["g", "x", "y"],
                             "angles_deg": [0, 180, 90]}]})
    assert err.path == "devices[0].derived[0].angles_deg"
    err = _bad({"derived": [{"name": "q", "kind": "mohr", "gauge": "g"}]})
    assert err.path == "devices[0].derived[0].kind"
    # a derived strain output may feed a later entry
    dev = sim_device([gauge("a", 0.0), gauge("b", 0.0), gauge("c", 0.0)])
    dev["derived"] = [{"name": "r", "kind": "rosette", "gauges": ["a", "b", "c"],
                       "layout": "delta"},
                      {"name": "c1", "kind": "creep", "gauge": "r_e1", "window_s": 60}]
    cfg = load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                           "devices": [dev]}))
    assert cfg.devices[0]["derived"][0]["angles_deg"] == [0.0, 60.0, 120.0]


def test_creep_rate_end_to_end_and_reference_kept_across_restart(tmp_path: Path) -> None:
    secondary_per_h = 5.0
    scale = 3600.0
    creep = {"kind": "creep", "load_at_s": 0, "elastic_microstrain": 800,
             "primary_microstrain": 40, "primary_tau_s": 300,
             "secondary_microstrain_per_h": secondary_per_h}
    chans = [gauge("spec", creep), gauge("ref", 500.0)]
    dev = sim_device(chans, rate_hz=200, noise_nv_per_v=20, time_scale=scale)
    dev["derived"] = [{"name": "cr", "kind": "creep", "gauge": "spec", "window_s": 1.0},
                      {"name": "since", "kind": "creep", "gauge": "ref", "window_s": 1.0,
                       "reference": "first"}]
    cfg = write_config(tmp_path, [dev])
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        svc.wait_ready(samples=700)
        st = svc.command("status")["devices"]["dev0"]
        assert st["units"]["cr_rate"] == "microstrain/h"
        time.sleep(0.4)
        assert svc.terminate() == 0
    state = json.loads((tmp_path / "data" / "straind-state.json").read_text())
    ref = state["channels"]["dev0/since"]["extra"]["creep_reference_microstrain"]
    assert ref == pytest.approx(500.0, abs=0.3)
    seg = sorted((tmp_path / "data").glob("*.h5"))[0]
    with h5py.File(seg, "r") as f:
        d = f["devices/dev0"]
        cols = [c.decode() if isinstance(c, bytes) else c for c in d.attrs["columns"]]
        assert cols == ["spec", "ref", "cr_strain", "cr_rate", "since_strain", "since_rate"]
        assert d["raw"].shape[1] == 2 and d["value"].shape[1] == 6
        v = d["value"][:]
        t = d["time_ns"][:]
        assert d["channels/cr_rate"].attrs["measured"] == False  # noqa: E712
        assert d["channels/cr_rate"].attrs["unit"] == "microstrain/h"
        kinds = [e.kind for e in read_events(f)]
        assert "creep_reference" in kinds
    # after the primary stage (40 microstrain, tau 300 s of truth: gone after a few truth
    # hours = a few sample-clock seconds) the rate is the secondary slope; in the service's
    # hours it is time_scale times the truth rate
    rate = v[:, 3]
    late = t >= t[0] + int(2.0e9)
    want = secondary_per_h * scale
    assert np.isfinite(rate[late]).all()
    assert np.median(rate[late]) == pytest.approx(want, rel=0.01)
    # the same slope from a least-squares line through the stored strain (numpy.polyfit)
    hours = (t[late] - t[0]) / 3.6e12
    assert np.polyfit(hours, v[late, 0], 1)[0] == pytest.approx(want, rel=0.01)
    # creep strain with reference tare is the gauge value itself
    np.testing.assert_array_equal(v[:, 2], v[:, 0])
    assert np.nanmean(v[:, 4]) == pytest.approx(0.0, abs=0.05)

    # restart with a changed truth: the first-value reference is kept, not taken again
    doc = yaml.safe_load(cfg.read_text())
    doc["devices"][0]["channels"][1]["options"]["truth"]["value"] = 650.0
    cfg.write_text(yaml.safe_dump(doc, sort_keys=False))
    with ServiceProcess(cfg, tmp_path / "straind.sock") as svc:
        st = svc.wait_ready(samples=50)
        assert st["devices"]["dev0"]["last_values"]["since_strain"] == pytest.approx(150.0, abs=0.5)
        assert svc.terminate() == 0


def test_creep_rate_restarts_when_time_goes_back() -> None:
    dev = sim_device([gauge("g", 100.0)], rate_hz=200, noise_nv_per_v=20)
    dev["derived"] = [{"name": "cr", "kind": "creep", "gauge": "g", "window_s": 0.5}]
    cfg = load_config_text(yaml.safe_dump({"station": {"id": "s"}, "storage": {"path": "/x"},
                                           "devices": [dev]}))
    d = cfg.devices[0]
    sim = BridgeSimulator(device_setup(d), d["options"])
    chain = DeviceChain(d)
    notes: list[tuple] = []
    chain.on_note = lambda *a: notes.append(a)
    from straind.block import Block
    codes, q = sim.codes(0, 200)
    first = chain.convert(Block("dev0", codes, q, 0, 5_000_000, 0, 0, 0, t0_ns=10_000_000_000))
    assert np.isfinite(first.values[-1, 2])  # a rate once the window has enough span
    # a reconnect anchored earlier (the wall clock stepped back): a new window, no exception
    again = chain.convert(Block("dev0", codes, q, 0, 5_000_000, 0, 0, 0, t0_ns=5_000_000_000))
    assert [n[0] for n in notes] == ["creep_rate_reset"]
    assert np.isnan(again.values[0, 2]) and np.isfinite(again.values[-1, 2])
    # a constant strain: no creep (rate within noise of zero microstrain per hour)
    assert abs(again.values[-1, 2]) < 0.05 * 3600
