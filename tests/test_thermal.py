"""Thermal output, gauge factor drift, transverse sensitivity and gauge factor plausibility.

Oracles are built here from the physics (resistance changes of the gauge, then what an
instrument set to a given gauge factor indicates) and from numpy.linalg.solve for the
transverse-sensitivity systems, never from the functions under test.
"""

from __future__ import annotations

import numpy as np
import pytest

from straind.thermal import (
    GAUGE_FACTOR_RANGES,
    GAUGE_TYPES,
    NU0_ASTM_E251,
    apparent_strain_microstrain,
    compensate,
    correct_gauge_factor_drift,
    correct_pair,
    gauge_factor_at,
    gauge_factor_warning,
    gauge_reading,
)

# Illustrative data-sheet-style thermal output polynomial of a steel-matched foil gauge
# (microstrain, T in C; shape typical of such curves, not a particular lot).
COEFFS = (-32.5, 2.65, -6.1e-2, 3.2e-4, -4.0e-7)
GF_REF = 2.00


def _power_sum(t, coeffs):
    """A0 + A1 T + ... written out term by term (independent of numpy.polynomial)."""
    t = np.asarray(t, dtype=np.float64)
    return sum(c * t**i for i, c in enumerate(coeffs))


def test_apparent_strain_polynomial_and_gf_scaling():
    t = np.linspace(-30, 150, 181)
    # Window, Strain Gauge Technology: thermal output is a resistance change dR/R = GF_ref *
    # eps_app; an instrument set to GF_used indicates (dR/R) / GF_used
    dr_over_r = GF_REF * _power_sum(t, COEFFS) * 1e-6
    for gf_used in (2.00, 2.10, 2.05):
        shown = dr_over_r / gf_used * 1e6
        np.testing.assert_allclose(
            apparent_strain_microstrain(t, COEFFS, GF_REF, gf_used), shown, rtol=1e-12, atol=1e-9)


def test_compensate_removes_a_temperature_swing_exactly():
    n = 2000
    time_s = np.linspace(0, 3600, n)
    t_c = 20.0 + 45.0 * np.sin(2 * np.pi * time_s / 1800.0) ** 2      # 20 -> 65 -> 20 C cycles
    true = 150.0 * np.tanh(time_s / 900.0)                             # mechanical strain, ue
    gf_used = 2.08
    t_zero = t_c[0]                                                    # tare at the first sample
    # Window, Strain Gauge Technology: indicated = mechanical + change of the thermal output
    # since the tare, both seen through the instrument's gauge factor setting
    thermal = GF_REF / gf_used * (_power_sum(t_c, COEFFS) - _power_sum(t_zero, COEFFS))
    indicated = true + thermal
    assert np.ptp(thermal) > 20.0          # the swing is large enough to matter
    got = compensate(indicated, t_c, t_zero, COEFFS, GF_REF, gf_used)
    np.testing.assert_allclose(got, true, rtol=0, atol=1e-10)
    # no change at the tare temperature
    assert compensate(5.0, t_zero, t_zero, COEFFS, GF_REF, gf_used) == pytest.approx(5.0, abs=1e-12)


def test_fewer_coefficients_and_validation():
    np.testing.assert_allclose(apparent_strain_microstrain([0.0, 10.0], (1.0, 2.0), 2.0, 2.0), [1.0, 21.0])
    with pytest.raises(ValueError):
        apparent_strain_microstrain(0.0, (), 2.0, 2.0)
    with pytest.raises(ValueError):
        apparent_strain_microstrain(0.0, (1, 2, 3, 4, 5, 6), 2.0, 2.0)
    with pytest.raises(ValueError):
        apparent_strain_microstrain(0.0, (1.0,), 2.0, 0.0)


def test_gauge_factor_temperature_coefficient():
    # Window, Strain Gauge Technology: GF(T) = GF_ref (1 + alpha (T - T_ref)), here +0.9 %/100 C
    alpha, t_ref = 0.9e-4, 24.0
    t = np.array([-20.0, 24.0, 124.0])
    np.testing.assert_allclose(gauge_factor_at(t, 2.05, alpha, t_ref),
                               [2.05 * (1 - 44 * alpha), 2.05, 2.05 * 1.009], rtol=1e-14)
    # physics: the gauge changes resistance by GF(T) * eps; the instrument divides by gf_used
    eps_true = np.array([800.0, 800.0, 800.0])
    gf_t = 2.05 * (1 + alpha * (t - t_ref))
    indicated = gf_t * eps_true / 2.00
    np.testing.assert_allclose(
        correct_gauge_factor_drift(indicated, t, 2.00, 2.05, alpha, t_ref), eps_true, rtol=1e-14)


def test_gauge_reading_definition():
    # ASTM E251: eps_hat = (eps_a + Kt eps_t) / (1 - nu0 Kt), nu0 = 0.285
    assert NU0_ASTM_E251 == 0.285
    # a gauge on the calibration beam (eps_t = -nu0 eps_a) reads eps_a exactly: that is what
    # the definition of the gauge factor with nu0 guarantees
    assert gauge_reading(1000.0, -0.285 * 1000.0, 0.02) == pytest.approx(1000.0, rel=1e-14)
    assert gauge_reading(1000.0, 0.0, 0.0) == 1000.0


def test_correct_pair_inverts_forward_model_against_linear_solve():
    rng = np.random.default_rng(3)
    ea, eb = rng.uniform(-2000, 2000, (2, 500))
    kt = rng.uniform(-0.05, 0.08, 500)
    ha = gauge_reading(ea, eb, kt)
    hb = gauge_reading(eb, ea, kt)
    got_a, got_b = correct_pair(ha, hb, kt)
    # Dally & Riley, Experimental Stress Analysis: orthogonal pair, solved as a 2x2 system
    mats = np.stack([np.stack([np.ones(500), kt], -1), np.stack([kt, np.ones(500)], -1)], 1)
    rhs = np.stack([ha, hb], -1) * (1 - 0.285 * kt)[:, None]
    sol = np.linalg.solve(mats, rhs[..., None])[..., 0]
    np.testing.assert_allclose(got_a, sol[:, 0], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(got_b, sol[:, 1], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(got_a, ea, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(got_b, eb, rtol=1e-12, atol=1e-9)
    # Kt matters: uncorrected readings are off by several microstrain here
    assert np.max(np.abs(ha - ea)) > 10.0


def test_kt_validation():
    with pytest.raises(ValueError):
        correct_pair(1.0, 1.0, 1.0)
    with pytest.raises(ValueError):
        gauge_reading(1.0, 1.0, 0.02, nu0=0.7)


def test_gauge_factor_warning_ranges():
    assert set(GAUGE_TYPES) == {"cu-ni-foil", "ni-cr-foil", "pt-w", "p-silicon", "n-silicon"}
    # common practice usual gauge factors: Cu-Ni 2.0-2.1, Ni-Cr 2.1-2.2, Pt-W about 4,
    # p-Si +80..+190, n-Si -25..-100
    ok = [("cu-ni-foil", 2.0), ("cu-ni-foil", 2.1), ("cu-ni-foil", 2.14), ("ni-cr-foil", 2.15),
          ("pt-w", 4.0), ("p-silicon", 80.0), ("p-silicon", 150.0), ("n-silicon", -25.0),
          ("n-silicon", -100.0)]
    for kind, gf in ok:
        assert gauge_factor_warning(kind, gf) is None, (kind, gf)
    bad = [("cu-ni-foil", 2.5), ("cu-ni-foil", 1.5), ("ni-cr-foil", 2.0 * 1.2), ("pt-w", 2.0),
           ("p-silicon", -120.0), ("p-silicon", 250.0), ("n-silicon", 50.0), ("n-silicon", -10.0),
           ("cu-ni-foil", 200.0)]
    for kind, gf in bad:
        msg = gauge_factor_warning(kind, gf)
        lo, hi = GAUGE_FACTOR_RANGES[kind]
        assert msg is not None and kind in msg and f"{lo:g} to {hi:g}" in msg, (kind, gf, msg)
    assert "not finite" in gauge_factor_warning("cu-ni-foil", float("nan"))
    with pytest.raises(ValueError):
        gauge_factor_warning("carbon", 2.0)
