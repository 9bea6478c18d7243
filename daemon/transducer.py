"""Bridge transducers (load, pressure and torque cells): tared ratio -> engineering value.

Two calibrations, both pure and vectorised:

* rated output: a cell of rated output S (mV/V) at capacity C reads ``value = (Vr*1000/S) * C``;
* certificate: a least-squares polynomial of degree 1..3 through the certificate points
  (mV/V, value), with per-point residuals kept for the record.

``ratio_v_per_v`` is the tared bridge ratio in V/V (the chain subtracts the zero first);
certificate points are in mV/V, as certificates print them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = ["value_from_rated", "Certificate", "fit_certificate", "MAX_DEGREE"]

#: Highest certificate polynomial degree accepted.
MAX_DEGREE = 3


def value_from_rated(
    ratio_v_per_v: np.ndarray | float, rated_output_mv_per_v: float, capacity: float
) -> np.ndarray:
    """Engineering value from the rated output: (Vr * 1000 / S) * C, in the capacity's unit."""
    s = _finite_float(rated_output_mv_per_v, "rated_output_mv_per_v")
    if s == 0.0:
        raise ValueError("rated_output_mv_per_v: must be non-zero")
    cap = _finite_float(capacity, "capacity")
    if cap == 0.0:
        raise ValueError("capacity: must be non-zero")
    return np.asarray(ratio_v_per_v, dtype=np.float64) * (1000.0 * cap / s)


@dataclass(frozen=True)
class Certificate:
    """A fitted certificate polynomial.

    coefficients:     c0..c_degree, **low to high**: value = sum c_k * u**k with u in mV/V, so
                      c_k is in value-unit per (mV/V)**k.
    degree:           polynomial degree (1..3).
    points_mv_per_v:  the certificate's bridge outputs (mV/V).
    values:           the certificate's values (value unit).
    residuals:        value - fitted value at each point (value unit).
    max_abs_residual: largest |residual| (value unit).
    """

    coefficients: tuple[float, ...]
    degree: int
    points_mv_per_v: tuple[float, ...]
    values: tuple[float, ...]
    residuals: tuple[float, ...]
    max_abs_residual: float

    def evaluate_mv_per_v(self, u_mv_per_v: np.ndarray | float) -> np.ndarray:
        """Polynomial at bridge outputs given in mV/V (Horner, vectorised)."""
        u = np.asarray(u_mv_per_v, dtype=np.float64)
        out = np.full(u.shape, self.coefficients[-1])
        for c in self.coefficients[-2::-1]:
            out = out * u + c
        return out

    def evaluate(self, ratio_v_per_v: np.ndarray | float) -> np.ndarray:
        """Engineering values for tared ratios in V/V (vectorised)."""
        return self.evaluate_mv_per_v(np.asarray(ratio_v_per_v, dtype=np.float64) * 1000.0)


def fit_certificate(
    points_mv_per_v: Sequence[float] | np.ndarray,
    values: Sequence[float] | np.ndarray,
    degree: int,
) -> Certificate:
    """Least-squares polynomial (degree 1..3) through certificate points; needs degree+1 distinct points.

    Solved with numpy.linalg.lstsq on a column-scaled Vandermonde matrix (the scaling keeps the
    cubic well conditioned whatever the span of the mV/V points).
    """
    if isinstance(degree, bool) or not isinstance(degree, (int, np.integer)):
        raise ValueError(f"degree: expected an integer 1..{MAX_DEGREE}, got {degree!r}")
    if not 1 <= int(degree) <= MAX_DEGREE:
        raise ValueError(f"degree: expected 1..{MAX_DEGREE}, got {degree}")
    deg = int(degree)
    u = np.asarray(points_mv_per_v, dtype=np.float64).reshape(-1)
    y = np.asarray(values, dtype=np.float64).reshape(-1)
    if u.size != y.size:
        raise ValueError(
            f"points_mv_per_v: {u.size} bridge outputs but {y.size} values; they must pair up"
        )
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(y))):
        raise ValueError("points_mv_per_v: certificate points and values must be finite")
    distinct = np.unique(u).size
    if distinct < deg + 1:
        raise ValueError(
            f"points_mv_per_v: a degree-{deg} fit needs at least {deg + 1} distinct points, "
            f"got {distinct}"
        )
    span = float(np.max(np.abs(u)))
    powers = np.arange(deg + 1)
    vander = (u[:, None] / span) ** powers          # columns u'^0 .. u'^deg, u' = u / span
    coef_scaled, *_ = np.linalg.lstsq(vander, y, rcond=None)
    coef = coef_scaled / span ** powers
    fitted = vander @ coef_scaled
    residuals = y - fitted
    return Certificate(
        coefficients=tuple(float(c) for c in coef),
        degree=deg,
        points_mv_per_v=tuple(float(v) for v in u),
        values=tuple(float(v) for v in y),
        residuals=tuple(float(r) for r in residuals),
        max_abs_residual=float(np.max(np.abs(residuals))),
    )


def _finite_float(v: object, name: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name}: expected a number, got {v!r}")
    f = float(v)
    if not math.isfinite(f):
        raise ValueError(f"{name}: expected a finite number, got {v!r}")
    return f
