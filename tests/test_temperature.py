"""RTD and thermocouple conversions checked against published values and a reference library.

Oracles: the IEC 60751 Pt100 table (values from memory, at its printed precision), the ITS-90
thermocouple tables (values from memory), and the PyPI package thermocouples_reference, which
carries the NIST Monograph 175 reference functions. That package's own inverse needs SciPy,
which the project does not use, so the inverse oracle here is a bisection on the package's
forward function (written in this file). The package is imported only by this test.
"""

from __future__ import annotations

import numpy as np
import pytest
from thermocouples_reference import thermocouples

from straind.temperature import (
    PT100_R0_OHM,
    PT1000_R0_OHM,
    TC_TYPES,
    rtd_ohm_from_ratio,
    rtd_resistance,
    rtd_temperature,
    tc_demf_dt_mv_per_c,
    tc_emf_mv,
    tc_inverse_range_c,
    tc_range_c,
    tc_temperature_c,
    tc_temperature_with_cjc,
)

# --------------------------------------------------------------------------- oracle helpers

_ZERO_C = np.array(0.0)  # the package needs array arguments under numpy 2 (it uses copy=False)


def ref_emf_mv(tc_type: str, t_c: np.ndarray) -> np.ndarray:
    """Reference function of thermocouples_reference, reference junction at 0 C."""
    return np.asarray(thermocouples[tc_type].emf_mVC(np.asarray(t_c, dtype=np.float64), Tref=_ZERO_C))


def ref_temperature_c(tc_type: str, emf_mv: np.ndarray, lo_c: float, hi_c: float) -> np.ndarray:
    """Vectorised bisection of the package's forward function on [lo_c, hi_c] (monotone there)."""
    e = np.asarray(emf_mv, dtype=np.float64)
    a = np.full(e.shape, lo_c)
    b = np.full(e.shape, hi_c)
    for _ in range(64):
        m = 0.5 * (a + b)
        above = ref_emf_mv(tc_type, m) > e
        b = np.where(above, m, b)
        a = np.where(above, a, m)
    return 0.5 * (a + b)


# --------------------------------------------------------------------------- platinum RTD

# IEC 60751 Pt100 values computed from the standard's coefficients (from memory, 4 decimals).
PT100_4DP = [(-100.0, 60.2558), (0.0, 100.0000), (100.0, 138.5055), (200.0, 175.8560),
             (300.0, 212.0515)]
# IEC 60751 Pt100 table, printed to 0.01 ohm (from memory).
PT100_TABLE = [(-200.0, 18.52), (-100.0, 60.26), (-50.0, 80.31), (0.0, 100.00), (50.0, 119.40),
               (100.0, 138.51), (200.0, 175.86), (300.0, 212.05), (400.0, 247.09),
               (500.0, 280.98), (600.0, 313.71), (700.0, 345.28), (800.0, 375.70),
               (850.0, 390.48)]


def test_pt100_matches_iec60751_values_to_printed_precision():
    t = np.array([p[0] for p in PT100_4DP])
    r = rtd_resistance(t)
    # IEC 60751 Callendar-Van Dusen values (from memory), printed to 1e-4 ohm
    np.testing.assert_array_less(np.abs(r - [p[1] for p in PT100_4DP]), 0.5e-4 + 1e-12)
    t2 = np.array([p[0] for p in PT100_TABLE])
    # IEC 60751 Pt100 table (from memory), printed to 0.01 ohm
    np.testing.assert_array_less(np.abs(rtd_resistance(t2) - [p[1] for p in PT100_TABLE]), 0.005 + 1e-12)


def test_pt100_inverse_of_table_resistances():
    inner = PT100_TABLE[1:-1]  # the rounded end values lie just outside -200..850 C
    r = np.array([p[1] for p in inner])
    t = rtd_temperature(r)
    # IEC 60751 Pt100 table (from memory): 0.005 ohm of table rounding is at most 0.02 C
    # (sensitivity >= 0.3 ohm/C over the range)
    np.testing.assert_array_less(np.abs(t - [p[0] for p in inner]), 0.02)


@pytest.mark.parametrize("r0", [PT100_R0_OHM, PT1000_R0_OHM])
def test_rtd_round_trip_full_range(r0):
    t = np.linspace(-200.0, 850.0, 200_001)
    t = np.concatenate([t, [-199.9999999, -1e-9, 0.0, 1e-9, 849.9999999]])
    back = rtd_temperature(rtd_resistance(t, r0), r0)
    # requirement of the project: the inverse round-trips to 1e-6 C
    assert np.max(np.abs(back - t)) < 1e-6
    assert not np.isnan(back).any()


def test_pt1000_is_ten_times_pt100():
    t = np.linspace(-200.0, 850.0, 1051)
    # IEC 60751: Pt1000 has the same coefficients with R0 = 1000 ohm
    np.testing.assert_allclose(rtd_resistance(t, PT1000_R0_OHM), 10.0 * rtd_resistance(t), rtol=1e-15)


def test_rtd_below_zero_uses_c_term_independently():
    # Callendar-Van Dusen (IEC 60751) written out term by term here for T < 0
    t = np.array([-200.0, -150.0, -37.5, -0.5])
    a, b, c = 3.9083e-3, -5.775e-7, -4.183e-12
    expected = 100.0 * (1 + a * t + b * t**2 + c * (t - 100.0) * t**3)
    np.testing.assert_allclose(rtd_resistance(t), expected, rtol=1e-14)
    # and the inverse against a root found by numpy.roots of the quartic (independent solver)
    for ti, ri in zip(t, expected):
        roots = np.roots([c * 100.0, -c * 100.0 * 100.0, b * 100.0, a * 100.0, 100.0 - ri])
        real = roots[np.abs(roots.imag) < 1e-9].real
        root = real[np.argmin(np.abs(real - ti))]
        assert abs(float(rtd_temperature(ri)) - root) < 1e-6


def test_rtd_out_of_range_is_nan():
    assert np.isnan(rtd_resistance(-200.001))
    assert np.isnan(rtd_resistance(850.001))
    # R(-200 C) = 18.52008 ohm and R(850 C) = 390.4811 ohm bound the valid range
    r = rtd_temperature(np.array([18.5200, 18.5201, 390.4811, 390.4812, np.nan, np.inf]))
    assert np.isnan(r[[0, 3, 4, 5]]).all() and np.isfinite(r[[1, 2]]).all()
    with pytest.raises(ValueError):
        rtd_resistance(0.0, r0_ohm=0.0)


def test_rtd_vectorised_shapes():
    t = np.linspace(-50, 150, 12).reshape(3, 4)
    r = rtd_resistance(t)
    assert r.shape == (3, 4)
    np.testing.assert_allclose(rtd_temperature(r), t, atol=1e-9)


def test_rtd_ohm_from_ratio_series_circuit():
    # Series circuit solved here: the excitation current I flows through R_ref and the RTD
    # (Ohm's law); the converter measures V_rtd against V_ref = I R_ref.
    r_ref, r_rtd, v_ex, r_lead = 400.0, float(rtd_resistance(57.3)), 3.3, 0.7
    current = v_ex / (r_ref + r_rtd + 2 * r_lead)
    v_rtd, v_ref = current * r_rtd, current * r_ref
    code = round(v_rtd / v_ref * 2**23)       # 24-bit converter, full scale = V_ref
    ohm = rtd_ohm_from_ratio(code / 2**23, r_ref)
    assert abs(ohm - r_rtd) <= r_ref / 2**23          # within one code
    assert abs(rtd_temperature(ohm) - 57.3) < 1e-3
    with pytest.raises(ValueError):
        rtd_ohm_from_ratio(0.5, -1.0)


# --------------------------------------------------------------------------- thermocouples

MAIN_TYPES = ("K", "J", "T", "E", "N")


@pytest.mark.parametrize("tc_type", TC_TYPES)
def test_tc_emf_matches_reference_package_full_range(tc_type):
    lo, hi = tc_range_c(tc_type)
    t = np.linspace(lo, hi, 40_001)
    # NIST Monograph 175 reference functions via thermocouples_reference. Both evaluate the
    # same published polynomials, so they agree to float rounding; 1e-10 mV is tight enough
    # that a change in the last printed digit of any coefficient would show
    np.testing.assert_allclose(tc_emf_mv(tc_type, t), ref_emf_mv(tc_type, t), rtol=0, atol=1e-10)


@pytest.mark.parametrize("tc_type", TC_TYPES)
def test_tc_seebeck_matches_reference_package(tc_type):
    lo, hi = tc_range_c(tc_type)
    t = np.linspace(lo + 1.0, hi - 1.0, 2001)
    h = 1e-3
    # central difference of the reference package's function (thermocouples_reference)
    slope = (ref_emf_mv(tc_type, t + h) - ref_emf_mv(tc_type, t - h)) / (2 * h)
    np.testing.assert_allclose(tc_demf_dt_mv_per_c(tc_type, t), slope, rtol=0, atol=1e-7)


# ITS-90 thermocouple tables (from memory), emf in mV rounded to 1 uV.
TABLE_MV = [("K", 100.0, 4.096), ("K", 1000.0, 41.276), ("K", 300.0, 12.209), ("K", -100.0, -3.554),
            ("K", 25.0, 1.000), ("J", 100.0, 5.269), ("J", 500.0, 27.393), ("T", 100.0, 4.279),
            ("E", 100.0, 6.319), ("N", 100.0, 2.774), ("S", 1000.0, 9.587),
            ("R", 1000.0, 10.506), ("B", 1000.0, 4.834)]


@pytest.mark.parametrize("tc_type,t_c,emf", TABLE_MV)
def test_tc_table_values(tc_type, t_c, emf):
    # ITS-90 thermocouple reference tables (NIST Monograph 175), from memory, printed to 1 uV
    assert abs(float(tc_emf_mv(tc_type, t_c)) - emf) <= 0.5e-3 + 1e-12


@pytest.mark.parametrize("tc_type", TC_TYPES)
def test_tc_inverse_polynomials_within_published_accuracy(tc_type):
    lo, hi = tc_inverse_range_c(tc_type)
    t_true = np.linspace(lo, hi, 20_001)
    emf = ref_emf_mv(tc_type, t_true)
    raw = tc_temperature_c(tc_type, emf, newton_steps=0)
    # NIST Monograph 175 (from memory): the inverse functions reproduce the reference function
    # within 0.06 C everywhere on these types (the widest band, type K above 500 C); a
    # mistyped coefficient would show by degrees
    assert np.max(np.abs(raw - t_true)) < 0.06
    # and they are not exact (so the polish below has work to do)
    assert np.max(np.abs(raw - t_true)) > 1e-3


@pytest.mark.parametrize("tc_type", TC_TYPES)
def test_tc_inverse_matches_reference_bisection(tc_type):
    lo, hi = tc_inverse_range_c(tc_type)
    rng = np.random.default_rng(7)
    emf_lo, emf_hi = ref_emf_mv(tc_type, np.array([lo, hi]))
    emf = np.concatenate([rng.uniform(emf_lo, emf_hi, 4000), [emf_lo, emf_hi]])
    t_ref = ref_temperature_c(tc_type, emf, lo, hi)
    t = tc_temperature_c(tc_type, emf)
    # bisection on thermocouples_reference's function; the project asks < 0.001 C after the
    # Newton polish, and it achieves float-level agreement
    assert np.max(np.abs(t - t_ref)) < 1e-6


@pytest.mark.parametrize("tc_type", MAIN_TYPES)
def test_tc_round_trip(tc_type):
    lo, hi = tc_inverse_range_c(tc_type)
    t = np.linspace(lo, hi, 100_001)
    back = tc_temperature_c(tc_type, tc_emf_mv(tc_type, t))
    # requirement of the project: round trip < 0.001 C
    assert np.max(np.abs(back - t)) < 1e-6


def test_tc_cold_junction_compensation_type_k_at_25c():
    # ITS-90 type K table (from memory): 300 C -> 12.209 mV, 25 C -> 1.000 mV, so a junction at
    # 25 C reads 11.209 mV for a 300 C hot end (table rounding: 1 uV / 41 uV/C ~ 0.03 C)
    assert abs(float(tc_temperature_with_cjc("K", 11.209, 25.0)) - 300.0) < 0.03
    # exact: emf difference from thermocouples_reference
    hot = np.array([-150.0, 20.0, 300.0, 1200.0])
    junction = np.array([25.0, 25.0, 40.0, -10.0])
    measured = ref_emf_mv("K", hot) - ref_emf_mv("K", junction)
    np.testing.assert_allclose(tc_temperature_with_cjc("K", measured, junction), hot, atol=1e-6)
    # broadcasting a scalar junction over a block
    block = (ref_emf_mv("J", np.linspace(0, 700, 50)) - ref_emf_mv("J", np.array([22.5])))
    np.testing.assert_allclose(tc_temperature_with_cjc("J", block, 22.5), np.linspace(0, 700, 50), atol=1e-6)


def test_tc_out_of_range_is_nan():
    assert np.isnan(tc_emf_mv("K", 1372.5))
    assert np.isnan(tc_emf_mv("K", -270.5))
    assert np.isfinite(tc_emf_mv("K", -250.0))           # forward function covers -270..1372
    e = np.array([-6.0, 55.0, np.nan, np.inf, 10.0])      # K inverse covers -5.891..54.886 mV
    t = tc_temperature_c("K", e)
    assert np.isnan(t[:4]).all() and np.isfinite(t[4])
    with pytest.raises(ValueError):
        tc_emf_mv("X", 0.0)
    with pytest.raises(ValueError):
        tc_temperature_c("K", 1.0, newton_steps=-1)


def test_tc_vectorised_shapes_and_lowercase():
    t = np.linspace(0, 400, 12).reshape(4, 3)
    e = tc_emf_mv("t", t)
    assert e.shape == (4, 3)
    np.testing.assert_allclose(tc_temperature_c("T", e), t, atol=1e-9)
