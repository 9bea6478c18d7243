"""Temperature effects on strain gauges and transverse sensitivity; gauge factor plausibility.

Pure and vectorised over numpy arrays; no I/O, no state. Strains are in microstrain wherever a
name says so; the transverse-sensitivity functions are linear and work in any strain unit
(the output has the input's unit).

Thermal output (apparent strain)
--------------------------------
A self-temperature-compensated gauge bonded to the material it is matched to still shows an
apparent strain with temperature, given by the gauge lot's data sheet as a polynomial
``eps_app(T) = A0 + A1 T + A2 T^2 + A3 T^3 + A4 T^4`` (microstrain, T in C) measured with the
instrument set to ``GF_ref``. An instrument set to ``GF_used`` shows ``eps_app * GF_ref/GF_used``.
The compensated strain subtracts the change of apparent strain since the tare:
``eps - (eps_app(T) - eps_app(T_zero))``. This software correction is an alternative to a dummy
gauge on unstrained material in the adjacent arm (hardware compensation); never apply both.

Gauge factor drift
------------------
``GF(T) = GF_ref (1 + alpha (T - T_ref))``. A strain computed with a fixed ``GF_used`` is
rescaled to ``strain * GF_used / GF(T)`` (exact for the linear gauge law, where the bridge
measures the product GF * strain).

Transverse sensitivity
----------------------
With the transverse sensitivity coefficient Kt defined as in ASTM E251 (gauge factor measured
on a field of Poisson ratio nu0 = 0.285), a gauge reads
``eps_hat = (eps_axial + Kt eps_transverse) / (1 - nu0 Kt)``. Two orthogonal gauges (same Kt)
invert exactly to ``eps_a = (1 - nu0 Kt) (eps_hat_a - Kt eps_hat_b) / (1 - Kt^2)``.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

__all__ = [
    "NU0_ASTM_E251",
    "GAUGE_TYPES",
    "GAUGE_FACTOR_RANGES",
    "GAUGE_FACTOR_MARGIN",
    "apparent_strain_microstrain",
    "compensate",
    "gauge_factor_at",
    "correct_gauge_factor_drift",
    "gauge_reading",
    "correct_pair",
    "gauge_factor_warning",
]

#: Poisson ratio of the gauge factor calibration field (ASTM E251).
NU0_ASTM_E251 = 0.285

#: Usual gauge factor per gauge type (common practice, no single source); used only for
#: plausibility warnings, never as defaults.
GAUGE_FACTOR_RANGES: dict[str, tuple[float, float]] = {
    "cu-ni-foil": (2.0, 2.1),      # copper-nickel (constantan) foil
    "ni-cr-foil": (2.1, 2.2),      # nickel-chromium foil
    "pt-w": (3.8, 4.2),            # platinum-tungsten, "about 4"
    "p-silicon": (80.0, 190.0),    # p-type semiconductor
    "n-silicon": (-100.0, -25.0),  # n-type semiconductor
}
GAUGE_TYPES: tuple[str, ...] = tuple(GAUGE_FACTOR_RANGES)
#: Tolerance beyond each usual range before a warning, as a fraction of the range's largest |GF|.
GAUGE_FACTOR_MARGIN = 0.025


def _positive_gf(name: str, v: float) -> float:
    f = float(v)
    if not math.isfinite(f) or f == 0.0:
        raise ValueError(f"{name}: expected a finite non-zero gauge factor, got {v!r}")
    return f


def _coeffs(coeffs_a0_to_a4: Sequence[float] | np.ndarray) -> np.ndarray:
    c = np.asarray(coeffs_a0_to_a4, dtype=np.float64).reshape(-1)
    if not 1 <= c.size <= 5:
        raise ValueError(f"coeffs: expected 1 to 5 coefficients A0..A4, got {c.size}")
    if not np.all(np.isfinite(c)):
        raise ValueError(f"coeffs: coefficients must be finite, got {c.tolist()}")
    return c


def apparent_strain_microstrain(
    t_c: np.ndarray | float,
    coeffs_a0_to_a4: Sequence[float] | np.ndarray,
    gf_ref: float,
    gf_used: float,
) -> np.ndarray:
    """Thermal output (microstrain) at t_c (C) as shown by an instrument set to ``gf_used``.

    ``coeffs_a0_to_a4``: data-sheet polynomial A0..A4 (microstrain / C^i; fewer terms allowed),
    valid at the data sheet's gauge factor ``gf_ref``.
    """
    c = _coeffs(coeffs_a0_to_a4)
    g_ref = _positive_gf("gf_ref", gf_ref)
    g_used = _positive_gf("gf_used", gf_used)
    t = np.asarray(t_c, dtype=np.float64)
    poly = np.polynomial.polynomial.polyval(t, c)
    return poly * (g_ref / g_used)


def compensate(
    strain_microstrain: np.ndarray | float,
    t_c: np.ndarray | float,
    t_zero_c: float,
    coeffs_a0_to_a4: Sequence[float] | np.ndarray,
    gf_ref: float,
    gf_used: float,
) -> np.ndarray:
    """Strain (microstrain) with the thermal output change since the tare removed.

    ``t_c`` is the gauge temperature at each sample (C), ``t_zero_c`` the temperature at the
    tare instant: result = strain - (eps_app(t_c) - eps_app(t_zero_c)). Inputs broadcast.
    """
    app = apparent_strain_microstrain(t_c, coeffs_a0_to_a4, gf_ref, gf_used)
    app0 = apparent_strain_microstrain(t_zero_c, coeffs_a0_to_a4, gf_ref, gf_used)
    return np.asarray(strain_microstrain, dtype=np.float64) - (app - app0)


def gauge_factor_at(
    t_c: np.ndarray | float, gf_ref: float, alpha_per_c: float, t_ref_c: float
) -> np.ndarray:
    """Gauge factor at t_c (C): GF_ref (1 + alpha (T - T_ref)); alpha in 1/C."""
    g_ref = _positive_gf("gf_ref", gf_ref)
    if not math.isfinite(float(alpha_per_c)):
        raise ValueError(f"alpha_per_c: expected a finite coefficient, got {alpha_per_c!r}")
    if not math.isfinite(float(t_ref_c)):
        raise ValueError(f"t_ref_c: expected a finite temperature, got {t_ref_c!r}")
    t = np.asarray(t_c, dtype=np.float64)
    return g_ref * (1.0 + float(alpha_per_c) * (t - float(t_ref_c)))


def correct_gauge_factor_drift(
    strain: np.ndarray | float,
    t_c: np.ndarray | float,
    gf_used: float,
    gf_ref: float,
    alpha_per_c: float,
    t_ref_c: float,
) -> np.ndarray:
    """Strain computed with a fixed ``gf_used`` -> strain with the gauge factor at t_c.

    ``strain * gf_used / GF(t_c)`` (any strain unit; the output has the same unit).
    """
    g_used = _positive_gf("gf_used", gf_used)
    gf_t = gauge_factor_at(t_c, gf_ref, alpha_per_c, t_ref_c)
    return np.asarray(strain, dtype=np.float64) * (g_used / gf_t)


def _check_kt(kt: np.ndarray | float, nu0: float) -> np.ndarray:
    k = np.asarray(kt, dtype=np.float64)
    if not np.all(np.isfinite(k)) or np.any(np.abs(k) >= 1.0):
        raise ValueError(f"kt: expected |Kt| < 1, got {kt!r}")
    if not (math.isfinite(float(nu0)) and -1.0 < float(nu0) <= 0.5):
        raise ValueError(f"nu0: expected a Poisson ratio in (-1, 0.5], got {nu0!r}")
    if np.any(np.abs(1.0 - float(nu0) * k) < 1e-12):
        raise ValueError(f"kt: 1 - nu0*Kt must not vanish, got Kt={kt!r}, nu0={nu0!r}")
    return k


def gauge_reading(
    eps_axial: np.ndarray | float,
    eps_transverse: np.ndarray | float,
    kt: np.ndarray | float,
    nu0: float = NU0_ASTM_E251,
) -> np.ndarray:
    """Strain a gauge with transverse sensitivity Kt indicates: (eps_a + Kt eps_t)/(1 - nu0 Kt)."""
    k = _check_kt(kt, nu0)
    ea = np.asarray(eps_axial, dtype=np.float64)
    et = np.asarray(eps_transverse, dtype=np.float64)
    return (ea + k * et) / (1.0 - float(nu0) * k)


def correct_pair(
    eps_hat_a: np.ndarray | float,
    eps_hat_b: np.ndarray | float,
    kt: np.ndarray | float,
    nu0: float = NU0_ASTM_E251,
) -> tuple[np.ndarray, np.ndarray]:
    """Readings of two orthogonal gauges with the same Kt -> true strains (eps_a, eps_b)."""
    k = _check_kt(kt, nu0)
    a = np.asarray(eps_hat_a, dtype=np.float64)
    b = np.asarray(eps_hat_b, dtype=np.float64)
    f = (1.0 - float(nu0) * k) / (1.0 - k * k)
    return f * (a - k * b), f * (b - k * a)


def gauge_factor_warning(gauge_type: str, gauge_factor: float) -> str | None:
    """A plausibility message when ``gauge_factor`` is far from the usual range of its type.

    Returns None when the value lies within the usual range widened by GAUGE_FACTOR_MARGIN
    (or is a semiconductor value within its wide band); the message names the expected range.
    Raises ValueError for an unknown gauge type.
    """
    if gauge_type not in GAUGE_FACTOR_RANGES:
        raise ValueError(f"gauge_type: expected one of {', '.join(GAUGE_TYPES)}, got {gauge_type!r}")
    lo, hi = GAUGE_FACTOR_RANGES[gauge_type]
    try:
        gf = float(gauge_factor)
    except (TypeError, ValueError):
        return f"gauge factor {gauge_factor!r} is not a number"
    if not math.isfinite(gf):
        return f"gauge factor {gauge_factor!r} is not finite"
    margin = GAUGE_FACTOR_MARGIN * max(abs(lo), abs(hi))
    if lo - margin <= gf <= hi + margin:
        return None
    return (
        f"gauge factor {gf:g} is outside the usual range for {gauge_type} gauges "
        f"({lo:g} to {hi:g}); check the gauge data sheet"
    )
