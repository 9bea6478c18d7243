"""Strain rosettes: gauge readings -> plane strain tensor -> principal strains -> stresses.

Pure and vectorised over numpy arrays; no I/O, no state.

Units: the strain reduction is linear, so readings may be in any strain unit and the tensor,
principal strains and shear strain come back in the same unit (microstrain in practice).
The stress functions take microstrain (``*_microstrain`` arguments) and return stress in the
unit of ``e_modulus`` (MPa when E is in MPa).

Geometry: gauge angles are measured counter-clockwise from the x axis, which is the axis of the
first gauge (a) in the rectangular and delta layouts. A gauge at angle t reads the normal strain
``eps(t) = ex cos^2 t + ey sin^2 t + gxy sin t cos t`` (gxy the engineering shear strain).
Rectangular rosette: a, b, c at 0, 45, 90 deg. Delta rosette: a, b, c at 0, 60, 120 deg.
The principal angle ``theta_p_deg`` is the angle from the x axis to the direction of the major
principal strain e1 (counter-clockwise positive), in (-90, 90].

Transverse sensitivity: each gauge of transverse sensitivity Kt reads
``(eps(t) + Kt eps(t + 90)) / (1 - nu0 Kt)`` (nu0 = 0.285, ASTM E251), which is again linear in
(ex, ey, gxy); :func:`strain_tensor_from_gauges` solves that system when ``kt`` is given.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

__all__ = [
    "NU0_ASTM_E251",
    "RECTANGULAR_DEG",
    "DELTA_DEG",
    "gauge_strains",
    "gauge_matrix",
    "strain_tensor_from_gauges",
    "correct_transverse",
    "correct_transverse_rectangular",
    "principal",
    "rectangular",
    "delta",
    "principal_stresses",
    "von_mises",
    "tresca",
    "uniaxial_stress",
]

NU0_ASTM_E251 = 0.285
RECTANGULAR_DEG = (0.0, 45.0, 90.0)
DELTA_DEG = (0.0, 60.0, 120.0)

_SQRT3 = math.sqrt(3.0)


def _angles(angles_deg: Sequence[float] | np.ndarray) -> np.ndarray:
    a = np.asarray(angles_deg, dtype=np.float64).reshape(-1)
    if a.size != 3 or not np.all(np.isfinite(a)):
        raise ValueError(f"angles_deg: expected three finite gauge angles, got {angles_deg!r}")
    return np.deg2rad(a)


def _rows(theta: np.ndarray) -> np.ndarray:
    """Rows [cos^2, sin^2, sin cos] of the strain transformation, one per angle."""
    c, s = np.cos(theta), np.sin(theta)
    return np.stack([c * c, s * s, s * c], axis=-1)


def _kt3(kt: np.ndarray | float, nu0: float) -> np.ndarray:
    k = np.broadcast_to(np.asarray(kt, dtype=np.float64), (3,)).copy()
    if not np.all(np.isfinite(k)) or np.any(np.abs(k) >= 1.0):
        raise ValueError(f"kt: expected |Kt| < 1 (one value or one per gauge), got {kt!r}")
    if not (math.isfinite(float(nu0)) and -1.0 < float(nu0) <= 0.5):
        raise ValueError(f"nu0: expected a Poisson ratio in (-1, 0.5], got {nu0!r}")
    return k


def gauge_matrix(
    angles_deg: Sequence[float] | np.ndarray,
    kt: np.ndarray | float = 0.0,
    nu0: float = NU0_ASTM_E251,
) -> np.ndarray:
    """3x3 matrix G with readings = G @ [ex, ey, gxy] for gauges at ``angles_deg``.

    With kt = 0 the rows are [cos^2 t, sin^2 t, sin t cos t]; otherwise each row is
    (row(t) + Kt_i row(t + 90 deg)) / (1 - nu0 Kt_i). ``kt``: one value or one per gauge.
    """
    th = _angles(angles_deg)
    k = _kt3(kt, nu0)
    g = _rows(th)
    if np.any(k != 0.0):
        g = (g + k[:, None] * _rows(th + 0.5 * math.pi)) / (1.0 - float(nu0) * k)[:, None]
    return g


def gauge_strains(
    ex: np.ndarray | float,
    ey: np.ndarray | float,
    gxy: np.ndarray | float,
    angles_deg: Sequence[float] | np.ndarray,
    kt: np.ndarray | float = 0.0,
    nu0: float = NU0_ASTM_E251,
) -> np.ndarray:
    """Forward model: strain tensor (broadcast shape s) -> readings (s + (3,)) of three gauges."""
    g = gauge_matrix(angles_deg, kt, nu0)
    t = np.stack(np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (ex, ey, gxy))), axis=-1)
    return t @ g.T


def strain_tensor_from_gauges(
    readings: np.ndarray,
    angles_deg: Sequence[float] | np.ndarray,
    kt: np.ndarray | float = 0.0,
    nu0: float = NU0_ASTM_E251,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Readings (..., 3) of gauges at ``angles_deg`` -> (ex, ey, gxy), each of shape (...).

    Solves readings = G @ [ex, ey, gxy] (see :func:`gauge_matrix`; with ``kt`` the readings are
    corrected for transverse sensitivity at the same time). The 3x3 system is inverted once and
    applied to the whole block. ValueError when the angles do not determine the tensor
    (e.g. two gauges 180 deg apart).
    """
    r = np.asarray(readings, dtype=np.float64)
    if r.shape[-1:] != (3,):
        raise ValueError(f"readings: expected shape (..., 3), got {r.shape}")
    g = gauge_matrix(angles_deg, kt, nu0)
    if np.linalg.cond(g) > 1e10:
        raise ValueError(f"angles_deg: gauges at {list(angles_deg)} deg do not determine the strain tensor")
    t = r @ np.linalg.inv(g).T
    return t[..., 0], t[..., 1], t[..., 2]


def correct_transverse(
    readings: np.ndarray,
    angles_deg: Sequence[float] | np.ndarray,
    kt: np.ndarray | float,
    nu0: float = NU0_ASTM_E251,
) -> np.ndarray:
    """Readings (..., 3) with transverse sensitivity -> true normal strains along each gauge."""
    ex, ey, gxy = strain_tensor_from_gauges(readings, angles_deg, kt, nu0)
    return gauge_strains(ex, ey, gxy, angles_deg)


def correct_transverse_rectangular(
    a: np.ndarray | float,
    b: np.ndarray | float,
    c: np.ndarray | float,
    kt: float,
    nu0: float = NU0_ASTM_E251,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Closed-form transverse correction of a 0/45/90 rosette with equal Kt in all gauges.

    f = (1 - nu0 Kt)/(1 - Kt^2); a' = f (a - Kt c), c' = f (c - Kt a), b' = f (b - Kt (a + c - b)).
    """
    k = float(_kt3(kt, nu0)[0])
    f = (1.0 - float(nu0) * k) / (1.0 - k * k)
    a_, b_, c_ = (np.asarray(v, dtype=np.float64) for v in (a, b, c))
    return f * (a_ - k * c_), f * (b_ - k * (a_ + c_ - b_)), f * (c_ - k * a_)


def _angle_deg(two_theta_y: np.ndarray, two_theta_x: np.ndarray) -> np.ndarray:
    """0.5 atan2(y, x) in degrees, mapped into (-90, 90]."""
    th = 0.5 * np.degrees(np.arctan2(two_theta_y + 0.0, two_theta_x + 0.0))  # +0.0: no -0.0
    return np.where(th <= -90.0, th + 180.0, th)


def principal(
    ex: np.ndarray | float, ey: np.ndarray | float, gxy: np.ndarray | float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Principal strains of the plane strain tensor: (e1, e2, theta_p_deg, gamma_max).

    e1 >= e2; theta_p_deg is the angle from x to the e1 direction in (-90, 90] (0 when the
    state is isotropic); gamma_max = e1 - e2 is the maximum in-plane engineering shear strain.
    """
    ex_, ey_, g_ = (np.asarray(v, dtype=np.float64) for v in (ex, ey, gxy))
    centre = 0.5 * (ex_ + ey_)
    radius = np.hypot(0.5 * (ex_ - ey_), 0.5 * g_)
    return centre + radius, centre - radius, _angle_deg(g_, ex_ - ey_), 2.0 * radius


def rectangular(
    a: np.ndarray | float, b: np.ndarray | float, c: np.ndarray | float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """0/45/90 rosette closed form: (e1, e2, theta_p_deg, gamma_max).

    e1,2 = (a + c)/2 +- sqrt(((a - b)^2 + (b - c)^2)/2); tan 2 theta_p = (2b - a - c)/(a - c).
    """
    a_, b_, c_ = (np.asarray(v, dtype=np.float64) for v in (a, b, c))
    centre = 0.5 * (a_ + c_)
    r = np.sqrt(0.5 * ((a_ - b_) ** 2 + (b_ - c_) ** 2))
    return centre + r, centre - r, _angle_deg(2.0 * b_ - a_ - c_, a_ - c_), 2.0 * r


def delta(
    a: np.ndarray | float, b: np.ndarray | float, c: np.ndarray | float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """0/60/120 rosette closed form: (e1, e2, theta_p_deg, gamma_max).

    e1,2 = (a + b + c)/3 +- (sqrt(2)/3) sqrt((a - b)^2 + (b - c)^2 + (c - a)^2);
    tan 2 theta_p = sqrt(3) (b - c) / (2a - b - c).
    """
    a_, b_, c_ = (np.asarray(v, dtype=np.float64) for v in (a, b, c))
    centre = (a_ + b_ + c_) / 3.0
    r = (math.sqrt(2.0) / 3.0) * np.sqrt((a_ - b_) ** 2 + (b_ - c_) ** 2 + (c_ - a_) ** 2)
    return centre + r, centre - r, _angle_deg(_SQRT3 * (b_ - c_), 2.0 * a_ - b_ - c_), 2.0 * r


def _elastic(e_modulus: float, nu: float) -> tuple[float, float]:
    e = float(e_modulus)
    n = float(nu)
    if not (math.isfinite(e) and e > 0.0):
        raise ValueError(f"e_modulus: expected a positive modulus, got {e_modulus!r}")
    if not (math.isfinite(n) and -1.0 < n < 0.5):
        raise ValueError(f"nu: expected a Poisson ratio in (-1, 0.5), got {nu!r}")
    return e, n


def principal_stresses(
    e1_microstrain: np.ndarray | float,
    e2_microstrain: np.ndarray | float,
    e_modulus: float,
    nu: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Plane stress Hooke's law for an isotropic material: (s1, s2) in the unit of e_modulus.

    s1 = E/(1 - nu^2) (e1 + nu e2), s2 = E/(1 - nu^2) (e2 + nu e1), strains in microstrain.
    """
    e, n = _elastic(e_modulus, nu)
    e1 = np.asarray(e1_microstrain, dtype=np.float64) * 1e-6
    e2 = np.asarray(e2_microstrain, dtype=np.float64) * 1e-6
    f = e / (1.0 - n * n)
    return f * (e1 + n * e2), f * (e2 + n * e1)


def von_mises(s1: np.ndarray | float, s2: np.ndarray | float) -> np.ndarray:
    """von Mises equivalent stress of a plane stress state: sqrt(s1^2 - s1 s2 + s2^2)."""
    a = np.asarray(s1, dtype=np.float64)
    b = np.asarray(s2, dtype=np.float64)
    return np.sqrt(a * a - a * b + b * b)


def tresca(s1: np.ndarray | float, s2: np.ndarray | float) -> np.ndarray:
    """Tresca equivalent stress (= 2 x maximum shear stress) of a plane stress state.

    The out-of-plane principal stress is zero, so the largest principal difference is
    max(|s1 - s2|, |s1|, |s2|); it exceeds |s1 - s2| when s1 and s2 have the same sign.
    """
    a = np.asarray(s1, dtype=np.float64)
    b = np.asarray(s2, dtype=np.float64)
    return np.maximum(np.abs(a - b), np.maximum(np.abs(a), np.abs(b)))


def uniaxial_stress(strain_microstrain: np.ndarray | float, e_modulus: float) -> np.ndarray:
    """Uniaxial stress E * strain (unit of e_modulus) from strain in microstrain."""
    e = float(e_modulus)
    if not (math.isfinite(e) and e > 0.0):
        raise ValueError(f"e_modulus: expected a positive modulus, got {e_modulus!r}")
    return np.asarray(strain_microstrain, dtype=np.float64) * 1e-6 * e
