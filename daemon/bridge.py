"""Measurement math of the bridge chain: converter codes -> ratio -> bridge inverse -> strain.

Everything here is pure and vectorised over numpy arrays; no I/O, no state.

Conventions
-----------
Arm convention (ours): ``Vo/Vex = R1/(R1+R2) - R4/(R3+R4)``; arms 1 and 3 add, 2 and 4 subtract.
Each arm is ``R_i = nominal_i * (1 + k_i * x) + lead_i`` with ``x = GF * strain`` of the active
gauge (``k_i = 0`` for a fixed completion arm). ``ratio`` always means Vo/Vex in V/V.

Lead placement chosen by :func:`circuit_for`:

* quarter, 2-wire: both leads in series with the gauge, ``2*RL`` in arm 1;
* quarter, 3-wire: ``RL`` in arm 1 and ``RL`` in arm 2 (the third lead is the sense lead and
  carries no current), so the zero does not shift;
* half-bending / half-poisson, 3-wire: ``RL`` in arms 1 and 2; half-opposite: ``RL`` in arms 1 and 3;
* full bridges: ``lead_ohm`` is **ignored**. The leads carry excitation only, and the ratio is
  taken against the sensed excitation (remote sense), so no lead resistance enters an arm;
* custom: 3-wire connection per half bridge: a half (arms 1-2 or 3-4) with an active gauge has
  ``RL`` in both of its arms, as the quarter bridge does; with all four arms active it is a full
  bridge and the leads are ignored (remote sense).

Tare (zero)
-----------
The tare maps the ratio measured at the tare instant to zero strain. With the circuit model's
own ratio at zero strain ``V0 = ratio_forward(circuit, 0)`` (non-zero e.g. for a 2-wire quarter
bridge with leads), the stored offset is ``offset = measured_at_tare - V0`` (:func:`zero_offset`),
and afterwards ``strain = inverse(measured - offset)``. Only the unmodelled imbalance is
subtracted, so the exact non-linear inverse still sees the modelled circuit around its true
operating point.

Inverse
-------
:class:`BridgeInverse` solves ``ratio_forward(c, x) = ratio`` for x exactly. When the forward
model is a Moebius (linear-fractional) function of x (only arms 1,2 vary, only arms 3,4 vary, or
the two halves share a denominator: every standard arrangement, with or without leads), the
inverse is ``x = (a V + b) / (c V + d)`` with coefficients in ``.mobius``, which a caller can
broadcast across channels (:func:`apply_mobius`). Otherwise (general custom arms) a vectorised
Newton iteration with the analytic derivative runs on the monotone branch of the forward model
that contains x = 0; it starts from the branch root of the quadratic obtained by clearing the
denominators of V(x) = t (or, on request, from the linear estimate), and any sample a Newton
step does not confirm goes through a per-sample bracket with bisection fallback. Ratios with no
solution on that branch with every arm resistance > 0 come back NaN with ok = False.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = [
    "CODE_MIN",
    "CODE_MAX",
    "BRIDGES",
    "WIRINGS",
    "X_SEARCH_LIMIT",
    "decode_int24_be",
    "encode_int24_be",
    "ratio_scale",
    "saturation_mask",
    "ratio_from_codes",
    "BridgeCircuit",
    "circuit_for",
    "ratio_forward",
    "BridgeInverse",
    "apply_mobius",
    "strain_from_x",
    "zero_offset",
    "shunted_arm_ohm",
    "ratio_with_shunt",
    "expected_shunt_strain",
    "shunted_ratio_at",
]

#: Signed 24-bit converter limits; these two codes are saturated and never converted.
CODE_MIN = -(1 << 23)
CODE_MAX = (1 << 23) - 1

BRIDGES = (
    "quarter",
    "half-bending",
    "half-poisson",
    "half-opposite",
    "full-bending",
    "full-poisson",
    "custom",
)
WIRINGS = ("2-wire", "3-wire")

#: The Newton path searches |x| <= this where the circuit itself puts no bound on x
#: (x = GF * strain; 1e3 is a thousand-fold resistance change, far beyond any gauge).
X_SEARCH_LIMIT = 1.0e3

_EPS = float(np.finfo(np.float64).eps)


# --------------------------------------------------------------------------- converter codes


def decode_int24_be(buf: bytes | bytearray | memoryview | np.ndarray) -> np.ndarray:
    """Big-endian signed 24-bit samples -> int32 array (one value per 3 bytes).

    Accepts bytes-like objects or a uint8 array (flat or (k, 3)); the byte count must be a
    multiple of 3.
    """
    if isinstance(buf, np.ndarray):
        if buf.dtype != np.uint8:
            raise ValueError(f"buf: expected a uint8 array, got dtype {buf.dtype}")
        raw = buf.reshape(-1)
    else:
        raw = np.frombuffer(bytes(buf) if isinstance(buf, memoryview) else buf, dtype=np.uint8)
    if raw.size % 3:
        raise ValueError(f"buf: length {raw.size} is not a multiple of 3 bytes")
    b = raw.reshape(-1, 3).astype(np.int32)
    v = (b[:, 0] << 16) | (b[:, 1] << 8) | b[:, 2]
    # Sign-extend bit 23: values >= 0x800000 wrap to negative.
    return (v ^ 0x800000) - 0x800000


def encode_int24_be(codes: np.ndarray | Sequence[int]) -> bytes:
    """int codes in [-2**23, 2**23-1] -> big-endian signed 24-bit bytes (inverse of decode)."""
    c = np.asarray(codes)
    if c.size and not np.issubdtype(c.dtype, np.integer):
        raise ValueError(f"codes: expected integers, got dtype {c.dtype}")
    c = c.astype(np.int64).reshape(-1)
    if c.size and (c.min() < CODE_MIN or c.max() > CODE_MAX):
        raise ValueError(f"codes: values must lie in [{CODE_MIN}, {CODE_MAX}]")
    u = (c & 0xFFFFFF).astype(np.uint32)
    out = np.empty((c.size, 3), dtype=np.uint8)
    out[:, 0] = (u >> 16) & 0xFF
    out[:, 1] = (u >> 8) & 0xFF
    out[:, 2] = u & 0xFF
    return out.tobytes()


def ratio_scale(
    gain: int,
    reference: str = "excitation",
    vref_v: float | None = None,
    excitation_v: float | None = None,
) -> float:
    """V/V per converter code: 1/(2**23 * gain), times vref_v/excitation_v for an external reference.

    With the reference tied to the excitation the converter is ratiometric and the excitation
    value cancels; with an external reference the code measures volts and must be divided by
    the excitation.
    """
    if isinstance(gain, bool) or not isinstance(gain, (int, np.integer)) or gain < 1:
        raise ValueError(f"gain: expected a positive integer PGA gain, got {gain!r}")
    base = 1.0 / (float(1 << 23) * int(gain))
    if reference == "excitation":
        return base
    if reference != "external":
        raise ValueError(f"reference: expected 'excitation' or 'external', got {reference!r}")
    if vref_v is None or not _finite_positive(vref_v):
        raise ValueError(f"vref_v: an external reference needs a positive voltage, got {vref_v!r}")
    if excitation_v is None or not _finite_positive(excitation_v):
        raise ValueError(
            f"excitation_v: an external reference needs a positive excitation, got {excitation_v!r}"
        )
    return base * float(vref_v) / float(excitation_v)


def saturation_mask(codes: np.ndarray) -> np.ndarray:
    """True where a code is at or beyond full scale (exactly 8388607 or -8388608)."""
    c = np.asarray(codes)
    return (c == CODE_MAX) | (c == CODE_MIN)


def ratio_from_codes(codes: np.ndarray, scale_v_per_code: float | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes -> ratio (V/V) with saturated codes set to NaN; returns (ratio, saturated mask).

    ``scale_v_per_code`` broadcasts (a scalar, or one value per channel for (n, m) codes).
    """
    c = np.asarray(codes)
    sat = saturation_mask(c)
    ratio = c.astype(np.float64) * np.asarray(scale_v_per_code, dtype=np.float64)
    ratio[sat] = np.nan
    return ratio, sat


# --------------------------------------------------------------------------- circuit


@dataclass(frozen=True)
class BridgeCircuit:
    """A Wheatstone bridge: R_i = nominal_ohm[i] * (1 + k[i] * x) + lead_ohm[i], x = GF * strain.

    nominal_ohm: arm resistances R1..R4 at zero strain (ohm, > 0).
    k:           strain multipliers per arm (x_i = k_i * x); 0 for a fixed arm.
    lead_ohm:    series lead resistance in each arm (ohm, >= 0).
    """

    nominal_ohm: tuple[float, float, float, float]
    k: tuple[float, float, float, float]
    lead_ohm: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        for name in ("nominal_ohm", "k", "lead_ohm"):
            vals = tuple(float(v) for v in getattr(self, name))
            if len(vals) != 4:
                raise ValueError(f"{name}: expected 4 values (arms 1..4), got {len(vals)}")
            if not all(math.isfinite(v) for v in vals):
                raise ValueError(f"{name}: values must be finite, got {vals}")
            object.__setattr__(self, name, vals)
        if any(v <= 0.0 for v in self.nominal_ohm):
            raise ValueError(f"nominal_ohm: arm resistances must be > 0, got {self.nominal_ohm}")
        if any(v < 0.0 for v in self.lead_ohm):
            raise ValueError(f"lead_ohm: lead resistances must be >= 0, got {self.lead_ohm}")
        if all(v == 0.0 for v in self.k):
            raise ValueError("k: at least one arm must respond to strain")

    def arm_ohm(self, x: np.ndarray | float) -> np.ndarray:
        """Arm resistances, shape (4, *x.shape)."""
        xa = np.asarray(x, dtype=np.float64)
        n = np.asarray(self.nominal_ohm).reshape((4,) + (1,) * xa.ndim)
        k = np.asarray(self.k).reshape(n.shape)
        lead = np.asarray(self.lead_ohm).reshape(n.shape)
        return n * (1.0 + k * xa) + lead


def circuit_for(
    bridge: str,
    gauge_ohm: float,
    completion_ohm: float | None = None,
    lead_ohm: float = 0.0,
    wiring: str = "3-wire",
    poisson: float | None = None,
    arms: Sequence[float] | None = None,
) -> BridgeCircuit:
    """Build the circuit of a named arrangement (lead placement: see the module docstring).

    Active arms have ``gauge_ohm``; completion arms ``completion_ohm`` (default ``gauge_ohm``).
    ``poisson`` is required for (and only allowed on) the *-poisson arrangements, ``arms``
    (k1..k4) for (and only on) ``custom``; 2-wire is allowed on the quarter bridge only.
    """
    if bridge not in BRIDGES:
        raise ValueError(f"bridge: expected one of {', '.join(BRIDGES)}, got {bridge!r}")
    if not _finite_positive(gauge_ohm):
        raise ValueError(f"gauge_ohm: expected a positive resistance, got {gauge_ohm!r}")
    if completion_ohm is not None and not _finite_positive(completion_ohm):
        raise ValueError(f"completion_ohm: expected a positive resistance, got {completion_ohm!r}")
    if not _finite(lead_ohm) or lead_ohm < 0:
        raise ValueError(f"lead_ohm: expected a resistance >= 0, got {lead_ohm!r}")
    if wiring not in WIRINGS:
        raise ValueError(f"wiring: expected one of {', '.join(WIRINGS)}, got {wiring!r}")
    if wiring == "2-wire" and bridge != "quarter":
        raise ValueError(f"wiring: 2-wire is only supported on a quarter bridge, not {bridge!r}")
    is_poisson = bridge.endswith("-poisson")
    if is_poisson:
        if poisson is None:
            raise ValueError(f"poisson: required for bridge {bridge!r}")
        if not _finite(poisson) or not (-1.0 < poisson <= 0.5):
            raise ValueError(f"poisson: expected a ratio in (-1, 0.5], got {poisson!r}")
    elif poisson is not None:
        raise ValueError(f"poisson: only used by half-poisson and full-poisson, not {bridge!r}")
    if bridge == "custom":
        if arms is None:
            raise ValueError("arms: required for a custom bridge ([k1, k2, k3, k4])")
        arms_t = tuple(float(a) for a in arms)
        if len(arms_t) != 4:
            raise ValueError(f"arms: expected 4 multipliers [k1, k2, k3, k4], got {len(arms_t)}")
        if not all(math.isfinite(a) for a in arms_t):
            raise ValueError(f"arms: multipliers must be finite, got {arms_t}")
        if all(a == 0.0 for a in arms_t):
            raise ValueError("arms: at least one arm must be active (non-zero)")
    elif arms is not None:
        raise ValueError(f"arms: only used by a custom bridge, not {bridge!r}")
    if bridge.startswith("full") and completion_ohm is not None and completion_ohm != gauge_ohm:
        raise ValueError(f"completion_ohm: a full bridge has no completion arms ({bridge!r})")

    rg = float(gauge_ohm)
    rc = rg if completion_ohm is None else float(completion_ohm)
    rl = float(lead_ohm)
    nu = 0.0 if poisson is None else float(poisson)

    if bridge == "quarter":
        k = (1.0, 0.0, 0.0, 0.0)
        active = (True, False, False, False)
        leads = (2.0 * rl, 0.0, 0.0, 0.0) if wiring == "2-wire" else (rl, rl, 0.0, 0.0)
    elif bridge == "half-bending":
        k, active, leads = (1.0, -1.0, 0.0, 0.0), (True, True, False, False), (rl, rl, 0.0, 0.0)
    elif bridge == "half-poisson":
        k, active, leads = (1.0, -nu, 0.0, 0.0), (True, True, False, False), (rl, rl, 0.0, 0.0)
    elif bridge == "half-opposite":
        k, active, leads = (1.0, 0.0, 1.0, 0.0), (True, False, True, False), (rl, 0.0, rl, 0.0)
    elif bridge == "full-bending":
        k, active, leads = (1.0, -1.0, 1.0, -1.0), (True,) * 4, (0.0,) * 4
    elif bridge == "full-poisson":
        k, active, leads = (1.0, -nu, 1.0, -nu), (True,) * 4, (0.0,) * 4
    else:  # custom
        k = arms_t
        active = tuple(a != 0.0 for a in k)
        if all(active):  # a full bridge: leads carry excitation only (remote sense)
            leads = (0.0,) * 4
        else:  # 3-wire: each half with an active gauge has one lead in each of its two arms
            left = rl if (active[0] or active[1]) else 0.0
            right = rl if (active[2] or active[3]) else 0.0
            leads = (left, left, right, right)
    nominal = tuple(rg if a else rc for a in active)
    return BridgeCircuit(nominal_ohm=nominal, k=k, lead_ohm=leads)  # type: ignore[arg-type]


def ratio_forward(c: BridgeCircuit, x: np.ndarray | float) -> np.ndarray:
    """Exact bridge output Vo/Vex = R1/(R1+R2) - R4/(R3+R4) for x = GF * strain (broadcasts)."""
    r1, r2, r3, r4 = c.arm_ohm(x)
    return r1 / (r1 + r2) - r4 / (r3 + r4)


# --------------------------------------------------------------------------- inverse


def apply_mobius(
    ratio: np.ndarray,
    a: np.ndarray | float,
    b: np.ndarray | float,
    c: np.ndarray | float,
    d: np.ndarray | float,
    x_lo: np.ndarray | float = -np.inf,
    x_hi: np.ndarray | float = np.inf,
) -> tuple[np.ndarray, np.ndarray]:
    """x = (a V + b) / (c V + d), NaN where x is not finite or outside (x_lo, x_hi).

    All coefficients broadcast, so (n, m) ratios take one coefficient per channel (shape (m,)).
    Returns (x, ok).
    """
    v = np.asarray(ratio, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = (a * v + b) / (c * v + d)
    ok = (x > x_lo) & (x < x_hi)  # False for NaN and +-inf
    x = np.where(ok, x, np.nan)
    return x, ok


class BridgeInverse:
    """Exact inverse of :func:`ratio_forward` for one circuit: ratio -> x = GF * strain.

    ``method``: "auto" (Moebius when available, else Newton), "mobius" (ValueError if the
    circuit has no linear-fractional form) or "newton" (force the general solver).
    ``newton_start``: "quadratic" (default; clearing the denominators of V(x) = t gives a
    quadratic in x, whose root on the branch is a start accurate to rounding, so one Newton step
    confirms it) or "linear" (start from the small-signal estimate; the bracketed iteration
    does all the work). Either way the result is accepted only after a Newton step below the
    rounding floor, and anything that fails goes through the bracketed Newton/bisection loop.

    Attributes:
        circuit:        the circuit.
        mobius:         (a, b, c, d) with x = (a V + b)/(c V + d) when the forward model is
                        linear-fractional, else None.
        x_domain:       open interval of x where every arm resistance is > 0.
        x_branch:       the part of x_domain the inverse searches (monotone branch around 0,
                        clipped to +-X_SEARCH_LIMIT on the Newton path where unbounded).
        ratio_at_zero:  ratio_forward(circuit, 0).
        sensitivity:    d(ratio)/dx at x = 0.
        method:         "mobius" or "newton", the path x_from_ratio takes.
    """

    def __init__(
        self, circuit: BridgeCircuit, method: str = "auto", newton_start: str = "quadratic"
    ) -> None:
        if method not in ("auto", "mobius", "newton"):
            raise ValueError(f"method: expected 'auto', 'mobius' or 'newton', got {method!r}")
        if newton_start not in ("quadratic", "linear"):
            raise ValueError(
                f"newton_start: expected 'quadratic' or 'linear', got {newton_start!r}"
            )
        self.circuit = circuit
        self.newton_start = newton_start
        n = np.asarray(circuit.nominal_ohm)
        k = np.asarray(circuit.k)
        lead = np.asarray(circuit.lead_ohm)
        A = n + lead          # arm resistance at x = 0
        B = n * k             # d(arm)/dx
        # F1 = R1/(R1+R2) = (p1 + q1 x)/(r1 + s1 x);  F2 = R4/(R3+R4) = (p2 + q2 x)/(r2 + s2 x)
        self._h1 = tuple(float(v) for v in (A[0], B[0], A[0] + A[1], B[0] + B[1]))
        self._h2 = tuple(float(v) for v in (A[3], B[3], A[2] + A[3], B[2] + B[3]))

        lo, hi = -math.inf, math.inf
        for ai, bi in zip(A, B):
            if bi > 0:
                lo = max(lo, -ai / bi)
            elif bi < 0:
                hi = min(hi, -ai / bi)
        self.x_domain = (float(lo), float(hi))

        self.ratio_at_zero = float(self._forward(np.float64(0.0)))
        self.sensitivity = float(self._derivative(np.float64(0.0)))
        scale = abs(self._h1[0] / self._h1[2]) + abs(self._h2[0] / self._h2[2])
        if not math.isfinite(self.sensitivity) or abs(self.sensitivity) <= 1e-12 * scale:
            raise ValueError("circuit: the bridge output does not respond to strain at zero")

        self.mobius = self._mobius_coefficients()
        if method == "mobius" and self.mobius is None:
            raise ValueError("method: this circuit's forward model is not linear-fractional")
        self.method = "mobius" if (self.mobius is not None and method != "newton") else "newton"
        if self.method == "mobius":
            self.x_branch = self.x_domain
        else:
            self.x_branch = self._newton_branch()
            self._v_lo = float(self._forward(np.float64(self.x_branch[0])))
            self._v_hi = float(self._forward(np.float64(self.x_branch[1])))
            self._sign = 1.0 if self.sensitivity > 0 else -1.0
            # Rounding floor of the forward model, expressed in x (stopping tolerance).
            self._xtol = 16.0 * _EPS * (1.0 + abs(self.ratio_at_zero)) / abs(self.sensitivity)
            # V(x) = t  <=>  N1 D2 - N2 D1 - t D1 D2 = 0: quadratic coefficients, linear in t.
            p1, q1, r1, s1 = self._h1
            p2, q2, r2, s2 = self._h2
            self._quad = (
                (q1 * s2 - q2 * s1, -s1 * s2),
                (p1 * s2 + q1 * r2 - p2 * s1 - q2 * r1, -(r1 * s2 + s1 * r2)),
                (p1 * r2 - p2 * r1, -r1 * r2),
            )

    # -- forward pieces (same algebra as ratio_forward, in the p + q x form)
    def _forward(self, x: np.ndarray) -> np.ndarray:
        p1, q1, r1, s1 = self._h1
        p2, q2, r2, s2 = self._h2
        return (p1 + q1 * x) / (r1 + s1 * x) - (p2 + q2 * x) / (r2 + s2 * x)

    def _derivative(self, x: np.ndarray) -> np.ndarray:
        p1, q1, r1, s1 = self._h1
        p2, q2, r2, s2 = self._h2
        d1 = r1 + s1 * x
        d2 = r2 + s2 * x
        return (q1 * r1 - p1 * s1) / (d1 * d1) - (q2 * r2 - p2 * s2) / (d2 * d2)

    def _mobius_coefficients(self) -> tuple[float, float, float, float] | None:
        p1, q1, r1, s1 = self._h1
        p2, q2, r2, s2 = self._h2
        tol = 1e-14

        def const(p: float, q: float, r: float, s: float) -> bool:
            return abs(p * s - q * r) <= tol * (abs(p * s) + abs(q * r))

        if const(p2, q2, r2, s2):           # F2 does not depend on x
            f2 = p2 / r2
            al, be, ga, de = p1 - f2 * r1, q1 - f2 * s1, r1, s1
        elif const(p1, q1, r1, s1):         # F1 does not depend on x
            f1 = p1 / r1
            al, be, ga, de = f1 * r2 - p2, f1 * s2 - q2, r2, s2
        elif abs(r1 * s2 - s1 * r2) <= tol * (abs(r1 * s2) + abs(s1 * r2)):  # shared denominator
            lam = r1 / r2
            al, be, ga, de = p1 - lam * p2, q1 - lam * q2, r1, s1
        else:
            return None
        # forward V = (al + be x)/(ga + de x)  ->  x = (-ga V + al)/(de V - be)
        coeffs = np.array([-ga, al, de, -be], dtype=np.float64)
        coeffs /= np.max(np.abs(coeffs))
        return tuple(float(v) for v in coeffs)  # type: ignore[return-value]

    def _newton_branch(self) -> tuple[float, float]:
        """Monotone branch of the forward model containing x = 0, inside the arm domain."""
        lo, hi = self.x_domain
        p1, q1, r1, s1 = self._h1
        p2, q2, r2, s2 = self._h2
        det1 = q1 * r1 - p1 * s1
        det2 = q2 * r2 - p2 * s2
        # V'(x) = det1/D1^2 - det2/D2^2 vanishes only if det1, det2 share a sign:
        # sqrt|det1| D2 = +- sqrt|det2| D1, two linear equations in x.
        if det1 * det2 > 0:
            g1, g2 = math.sqrt(abs(det1)), math.sqrt(abs(det2))
            for sgn in (1.0, -1.0):
                den = g1 * s2 - sgn * g2 * s1
                if den != 0.0:
                    xc = (sgn * g2 * r1 - g1 * r2) / den
                    if lo < xc < hi:
                        if xc < 0:
                            lo = xc
                        elif xc > 0:
                            hi = xc
        lo = max(lo, -X_SEARCH_LIMIT)
        hi = min(hi, X_SEARCH_LIMIT)
        # Stay strictly inside: arms at exactly zero resistance are not a physical solution.
        lo += 1e-12 * (1.0 + abs(lo))
        hi -= 1e-12 * (1.0 + abs(hi))
        return float(lo), float(hi)

    def x_from_ratio(self, ratio: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
        """ratio (V/V, any shape) -> (x, ok); x is NaN and ok False where no physical solution."""
        v = np.asarray(ratio, dtype=np.float64)
        if self.method == "mobius":
            a, b, c, d = self.mobius  # type: ignore[misc]
            return apply_mobius(v, a, b, c, d, *self.x_domain)
        return self._newton(v)

    def _newton(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        shape = v.shape
        t = v.reshape(-1)
        x_out = np.full(t.shape, np.nan)
        ok_out = np.zeros(t.shape, dtype=bool)
        v_min, v_max = min(self._v_lo, self._v_hi), max(self._v_lo, self._v_hi)
        idx = np.flatnonzero((t > v_min) & (t < v_max))  # excludes NaN: no solution outside
        if idx.size and self.newton_start == "quadratic":
            tt = t[idx]
            x = self._quadratic_start(tt)
            with np.errstate(divide="ignore", invalid="ignore"):
                step = (self._forward(x) - tt) / self._derivative(x)
            x = x - step
            lo, hi = self.x_branch
            good = (np.abs(step) <= self._xtol + 4.0 * _EPS * np.abs(x)) & (x > lo) & (x < hi)
            x_out[idx[good]] = x[good]
            ok_out[idx[good]] = True
            idx = idx[~good]
        if idx.size:
            self._bracketed(t, idx, x_out, ok_out)
        return x_out.reshape(shape), ok_out.reshape(shape)

    def _quadratic_start(self, tt: np.ndarray) -> np.ndarray:
        """Root of the cleared quadratic that lies on the branch (NaN where none is found)."""
        (a0, a1), (b0, b1), (c0, c1) = self._quad
        qa = a0 + a1 * tt
        qb = b0 + b1 * tt
        qc = c0 + c1 * tt
        with np.errstate(divide="ignore", invalid="ignore"):
            w = -(qb + np.copysign(np.sqrt(qb * qb - 4.0 * qa * qc), qb))
            x_small = 2.0 * qc / w       # cancellation-free form of each root
            x_big = w / (2.0 * qa)
        lo, hi = self.x_branch
        return np.where((x_small > lo) & (x_small < hi), x_small, x_big)

    def _bracketed(
        self, t: np.ndarray, idx: np.ndarray, x_out: np.ndarray, ok_out: np.ndarray,
        max_iter: int = 200,
    ) -> None:
        """Newton from the linear estimate with a per-sample bracket; bisection when a step leaves it."""
        sgn = self._sign
        tt = t[idx]
        a = np.full(idx.size, self.x_branch[0])
        b = np.full(idx.size, self.x_branch[1])
        x = (tt - self.ratio_at_zero) / self.sensitivity      # linear estimate
        outside = ~((x > a) & (x < b))
        x[outside] = 0.5 * (a[outside] + b[outside])
        xtol = self._xtol
        p1, q1, r1, s1 = self._h1
        p2, q2, r2, s2 = self._h2
        det1 = sgn * (q1 * r1 - p1 * s1)
        det2 = sgn * (q2 * r2 - p2 * s2)
        for _ in range(max_iter):
            # g(x) = sgn * (V(x) - target) is increasing on the branch; g' from the same pieces.
            i1 = 1.0 / (r1 + s1 * x)
            i2 = 1.0 / (r2 + s2 * x)
            g = sgn * ((p1 + q1 * x) * i1 - (p2 + q2 * x) * i2 - tt)
            gp = det1 * i1 * i1 - det2 * i2 * i2
            np.copyto(b, x, where=g > 0.0)
            np.copyto(a, x, where=g < 0.0)
            with np.errstate(divide="ignore", invalid="ignore"):
                xn = x - g / gp
            hit = g == 0.0
            bad = ~((xn > a) & (xn < b)) & ~hit
            if bad.any():
                xn[bad] = 0.5 * (a[bad] + b[bad])
            xn[hit] = x[hit]
            tol = xtol + 4.0 * _EPS * np.abs(xn)
            done = hit | (np.abs(xn - x) <= tol) | ((b - a) <= tol)
            x = xn
            if done.any():
                x_out[idx[done]] = x[done]
                ok_out[idx[done]] = True
                keep = ~done
                idx, tt, x, a, b = idx[keep], tt[keep], x[keep], a[keep], b[keep]
                if idx.size == 0:
                    break
        # anything left in idx did not converge: stays NaN / not ok


# --------------------------------------------------------------------------- gauge law, tare, shunt


def strain_from_x(
    x: np.ndarray | float, gauge_factor: float, gf2: float = 0.0
) -> np.ndarray:
    """x = dR/R0 of the active gauge -> strain (dimensionless).

    Linear gauges: x / GF. Semiconductor gauges (gf2 != 0): the root of
    GF*eps + gf2*eps**2 = x nearest x/GF, by the cancellation-free form
    eps = 2x / (GF + sign(GF) sqrt(GF**2 + 4 gf2 x)); NaN where no real root exists.
    """
    if not _finite(gauge_factor) or gauge_factor == 0:
        raise ValueError(f"gauge_factor: expected a finite non-zero value, got {gauge_factor!r}")
    if not _finite(gf2):
        raise ValueError(f"gf2: expected a finite value, got {gf2!r}")
    xa = np.asarray(x, dtype=np.float64)
    gf = float(gauge_factor)
    if gf2 == 0.0:
        return xa / gf
    disc = gf * gf + 4.0 * float(gf2) * xa
    with np.errstate(invalid="ignore"):
        root = np.sqrt(disc)  # NaN where disc < 0
    return 2.0 * xa / (gf + math.copysign(1.0, gf) * root)


def zero_offset(measured_ratio_at_tare: np.ndarray | float, circuit: BridgeCircuit) -> np.ndarray:
    """Tare offset (V/V): measured ratio at the tare instant minus the model's ratio at zero strain.

    Afterwards strain = inverse(measured - offset), which is zero at the tare instant.
    """
    v0 = ratio_forward(circuit, 0.0)
    return np.asarray(measured_ratio_at_tare, dtype=np.float64) - v0


def shunted_arm_ohm(arm_ohm: np.ndarray | float, shunt_ohm: float) -> np.ndarray:
    """Resistance of an arm with a shunt resistor across it: R Rs / (R + Rs)."""
    if not _finite_positive(shunt_ohm):
        raise ValueError(f"shunt_ohm: expected a positive resistance, got {shunt_ohm!r}")
    r = np.asarray(arm_ohm, dtype=np.float64)
    return r * shunt_ohm / (r + shunt_ohm)


def ratio_with_shunt(
    circuit: BridgeCircuit, shunt_ohm: float, arm: int, *, include_lead: bool = True
) -> float:
    """Bridge ratio at zero strain with ``shunt_ohm`` across arm ``arm`` (1..4).

    include_lead=True: the shunt sits at the instrument terminals, across the whole arm
    including its lead resistance; False: across the arm's nominal resistance only (at the gauge).
    """
    if isinstance(arm, bool) or arm not in (1, 2, 3, 4):
        raise ValueError(f"arm: expected 1, 2, 3 or 4, got {arm!r}")
    r = [n + l for n, l in zip(circuit.nominal_ohm, circuit.lead_ohm)]
    i = arm - 1
    if include_lead:
        r[i] = float(shunted_arm_ohm(r[i], shunt_ohm))
    else:
        r[i] = float(shunted_arm_ohm(circuit.nominal_ohm[i], shunt_ohm)) + circuit.lead_ohm[i]
    return r[0] / (r[0] + r[1]) - r[3] / (r[2] + r[3])


def shunted_ratio_at(
    circuit: BridgeCircuit, x: float, shunt_ohm: float, arm: int, *, include_lead: bool = True
) -> float:
    """Bridge ratio with ``shunt_ohm`` across arm ``arm`` while the bridge sits at state ``x``
    (x = GF * strain of the active gauges): the exact forward model of a shunt calibration
    taken under load."""
    if isinstance(arm, bool) or arm not in (1, 2, 3, 4):
        raise ValueError(f"arm: expected 1, 2, 3 or 4, got {arm!r}")
    nominal = np.asarray(circuit.nominal_ohm) * (1.0 + np.asarray(circuit.k) * float(x))
    lead = np.asarray(circuit.lead_ohm, dtype=np.float64)
    r = list(nominal + lead)
    i = arm - 1
    if include_lead:
        r[i] = float(shunted_arm_ohm(r[i], shunt_ohm))
    else:
        r[i] = float(shunted_arm_ohm(nominal[i], shunt_ohm)) + float(lead[i])
    return r[0] / (r[0] + r[1]) - r[3] / (r[2] + r[3])


def expected_shunt_strain(
    circuit: BridgeCircuit,
    gauge_factor: float,
    shunt_ohm: float,
    arm: int,
    *,
    gf2: float = 0.0,
    include_lead: bool = True,
) -> float:
    """Strain the exact inverse reports with the shunt across ``arm`` at zero strain.

    For arm 1 of a quarter bridge without leads this is -Rg / (GF (Rg + Rs)); a shunt on an
    adjacent arm (2 or 4) simulates tension. Compared with the measured shunt step it gives the
    chain's gain error.
    """
    v = ratio_with_shunt(circuit, shunt_ohm, arm, include_lead=include_lead)
    x, ok = BridgeInverse(circuit).x_from_ratio(np.array([v]))
    if not ok[0]:
        raise ValueError(
            f"shunt_ohm: a {shunt_ohm!r} ohm shunt on arm {arm} has no physical strain solution"
        )
    return float(strain_from_x(x[0], gauge_factor, gf2))


def _finite(v: object) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) and math.isfinite(float(v))


def _finite_positive(v: object) -> bool:
    return _finite(v) and float(v) > 0.0  # type: ignore[arg-type]
