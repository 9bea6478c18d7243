"""Temperature sensors: platinum RTDs (Callendar-Van Dusen) and thermocouples (ITS-90 functions).

Everything here is pure and vectorised over numpy arrays; no I/O, no state. Values outside a
function's validity range come back NaN (never clipped or extrapolated silently).

Platinum RTD (IEC 60751)
------------------------
``R(T) = R0 (1 + A T + B T^2)`` for ``T >= 0 C`` and ``R0 (1 + A T + B T^2 + C (T - 100) T^3)``
for ``T < 0 C``, with A = 3.9083e-3 /C, B = -5.775e-7 /C^2, C = -4.183e-12 /C^4, valid from -200
to 850 C. The inverse is the closed-form root of the quadratic for ``R >= R0`` and, below R0,
the quadratic root polished by Newton iterations on the full quartic (to float rounding).

The converter reads an RTD ratiometrically: the same excitation current flows through the RTD
and a reference resistor in series, and the converter's reference input is the voltage across
the reference resistor, so a full-scale code means ``V_rtd = V_ref``, i.e. ``R_rtd = R_ref``.
:func:`rtd_ohm_from_ratio` turns that ratio into ohms.

Thermocouples (ITS-90 reference functions)
------------------------------------------
Types B, E, J, K, N, R, S and T. The forward functions give the emf in mV of a thermocouple
with its reference junction at 0 C as a polynomial in T (C) per range; type K above 0 C adds the
term ``a0 exp(a1 (T - a2)^2)``. The inverse functions are the published inverse polynomials in
the emf (mV) per range, which approximate the forward function only to a few hundredths of a
degree; :func:`tc_temperature_c` therefore polishes them by Newton steps against the forward
function (two by default), after which the result round-trips to far below 0.001 C.
The inverse is defined over the published inverse ranges (e.g. type K from -200 C); emf values
outside them come back NaN.

Cold-junction compensation: a thermocouple whose reference junction sits at ``T_j`` produces
``E(T) - E(T_j)``; the measuring-junction temperature is the inverse of ``measured + E(T_j)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.polynomial import polynomial as _P

__all__ = [
    "IEC60751_A",
    "IEC60751_B",
    "IEC60751_C",
    "PT100_R0_OHM",
    "PT1000_R0_OHM",
    "RTD_T_MIN_C",
    "RTD_T_MAX_C",
    "rtd_resistance",
    "rtd_temperature",
    "rtd_ohm_from_ratio",
    "TC_TYPES",
    "tc_range_c",
    "tc_inverse_range_c",
    "tc_emf_mv",
    "tc_demf_dt_mv_per_c",
    "tc_temperature_c",
    "tc_temperature_with_cjc",
]

# --------------------------------------------------------------------------- platinum RTD

#: Callendar-Van Dusen coefficients of IEC 60751 (industrial platinum, alpha = 0.00385).
IEC60751_A = 3.9083e-3
IEC60751_B = -5.775e-7
IEC60751_C = -4.183e-12
PT100_R0_OHM = 100.0
PT1000_R0_OHM = 1000.0
#: Validity range of the Callendar-Van Dusen equation (C).
RTD_T_MIN_C = -200.0
RTD_T_MAX_C = 850.0


def _cvd_ratio(t: np.ndarray, a: float, b: float, c: float) -> np.ndarray:
    """R/R0 of the Callendar-Van Dusen equation (no range check)."""
    w = 1.0 + t * (a + b * t)
    neg = t < 0.0
    return np.where(neg, w + c * (t - 100.0) * t**3, w)


def _check_r0(r0_ohm: float) -> float:
    r0 = float(r0_ohm)
    if not (math.isfinite(r0) and r0 > 0.0):
        raise ValueError(f"r0_ohm: expected a positive resistance, got {r0_ohm!r}")
    return r0


def rtd_resistance(
    t_c: np.ndarray | float,
    r0_ohm: float = PT100_R0_OHM,
    a: float = IEC60751_A,
    b: float = IEC60751_B,
    c: float = IEC60751_C,
) -> np.ndarray:
    """Platinum RTD resistance (ohm) at temperature t_c (C); NaN outside -200..850 C.

    ``r0_ohm`` is the resistance at 0 C (100 for Pt100, 1000 for Pt1000).
    """
    r0 = _check_r0(r0_ohm)
    t = np.asarray(t_c, dtype=np.float64)
    ok = (t >= RTD_T_MIN_C) & (t <= RTD_T_MAX_C)
    tt = np.where(ok, t, 0.0)
    return np.where(ok, r0 * _cvd_ratio(tt, a, b, c), np.nan)


def rtd_temperature(
    r_ohm: np.ndarray | float,
    r0_ohm: float = PT100_R0_OHM,
    a: float = IEC60751_A,
    b: float = IEC60751_B,
    c: float = IEC60751_C,
    max_iter: int = 30,
) -> np.ndarray:
    """Inverse Callendar-Van Dusen: RTD resistance (ohm) -> temperature (C).

    For R >= R0 the quadratic root ``T = 2x / (A + sqrt(A^2 + 4 B x))``, ``x = R/R0 - 1``
    (cancellation-free form) is exact. For R < R0 that root starts vectorised Newton iterations
    on the full equation, which stop at float rounding. NaN outside R(-200 C)..R(850 C) and
    for non-finite input.
    """
    r0 = _check_r0(r0_ohm)
    r = np.asarray(r_ohm, dtype=np.float64)
    x = r / r0 - 1.0
    x_lo = float(_cvd_ratio(np.float64(RTD_T_MIN_C), a, b, c)) - 1.0
    x_hi = float(_cvd_ratio(np.float64(RTD_T_MAX_C), a, b, c)) - 1.0
    # A tolerance of a few ulps so the range ends themselves round-trip.
    tol = 8.0 * np.finfo(np.float64).eps
    ok = (x >= x_lo - tol) & (x <= x_hi + tol)
    xs = np.where(ok, x, 0.0)
    with np.errstate(invalid="ignore"):
        t = 2.0 * xs / (a + np.sqrt(a * a + 4.0 * b * xs))
    neg = np.flatnonzero((xs < 0.0).reshape(-1))
    if neg.size:
        tf = t.reshape(-1).copy()
        tn = tf[neg]
        target = xs.reshape(-1)[neg]
        for _ in range(max_iter):
            f = tn * (a + b * tn) + c * (tn - 100.0) * tn**3 - target
            fp = a + 2.0 * b * tn + c * (4.0 * tn**3 - 300.0 * tn**2)
            step = f / fp
            tn = tn - step
            if np.all(np.abs(step) <= 1e-13 * (1.0 + np.abs(tn))):
                break
        tf[neg] = tn
        t = tf.reshape(t.shape)
    return np.where(ok, t, np.nan)


def rtd_ohm_from_ratio(ratio: np.ndarray | float, reference_ohm: float) -> np.ndarray:
    """Ratiometric RTD reading -> ohm: ``R_rtd = ratio * R_ref``.

    Assumes the RTD and the reference resistor carry the same excitation current (in series)
    and the converter's reference input is the voltage across the reference resistor, so
    ``ratio = V_rtd / V_ref`` (code / full-scale code, after dividing out the PGA gain) and a
    full-scale code corresponds to ``R_rtd = R_ref``. The current's value cancels.
    """
    ref = float(reference_ohm)
    if not (math.isfinite(ref) and ref > 0.0):
        raise ValueError(f"reference_ohm: expected a positive resistance, got {reference_ohm!r}")
    return np.asarray(ratio, dtype=np.float64) * ref


# --------------------------------------------------------------------------- thermocouples


@dataclass(frozen=True)
class _TcTable:
    """Reference function of one thermocouple type.

    forward: (t_lo_c, t_hi_c, c0..cn) per range, emf in mV for T in C.
    exp_term: (a0, a1, a2) of type K's term a0 exp(a1 (T - a2)^2), added for T >= 0 C.
    inverse: (t_lo_c, t_hi_c, d0..dn) per range, T in C for emf in mV; the selection boundaries
        are the emf of t_lo/t_hi by the forward function (consecutive ranges share a boundary).
    """

    forward: tuple[tuple[float, float, tuple[float, ...]], ...]
    inverse: tuple[tuple[float, float, tuple[float, ...]], ...]
    exp_term: tuple[float, float, float] | None = None


_TC: dict[str, _TcTable] = {
    "K": _TcTable(
        forward=(
            (-270.0, 0.0, (
                0.000000000000e00, 0.394501280250e-01, 0.236223735980e-04,
                -0.328589067840e-06, -0.499048287770e-08, -0.675090591730e-10,
                -0.574103274280e-12, -0.310888728940e-14, -0.104516093650e-16,
                -0.198892668780e-19, -0.163226974860e-22)),
            (0.0, 1372.0, (
                -0.176004136860e-01, 0.389212049750e-01, 0.185587700320e-04,
                -0.994575928740e-07, 0.318409457190e-09, -0.560728448890e-12,
                0.560750590590e-15, -0.320207200030e-18, 0.971511471520e-22,
                -0.121047212750e-25)),
        ),
        exp_term=(0.118597600000e00, -0.118343200000e-03, 0.126968600000e03),
        inverse=(
            (-200.0, 0.0, (
                0.0, 2.5173462e01, -1.1662878e00, -1.0833638e00, -8.9773540e-01,
                -3.7342377e-01, -8.6632643e-02, -1.0450598e-02, -5.1920577e-04)),
            (0.0, 500.0, (
                0.0, 2.508355e01, 7.860106e-02, -2.503131e-01, 8.315270e-02,
                -1.228034e-02, 9.804036e-04, -4.413030e-05, 1.057734e-06, -1.052755e-08)),
            (500.0, 1372.0, (
                -1.318058e02, 4.830222e01, -1.646031e00, 5.464731e-02, -9.650715e-04,
                8.802193e-06, -3.110810e-08)),
        ),
    ),
    "J": _TcTable(
        forward=(
            (-210.0, 760.0, (
                0.000000000000e00, 0.503811878150e-01, 0.304758369300e-04,
                -0.856810657200e-07, 0.132281952950e-09, -0.170529583370e-12,
                0.209480906970e-15, -0.125383953360e-18, 0.156317256970e-22)),
            (760.0, 1200.0, (
                0.296456256810e03, -0.149761277860e01, 0.317871039240e-02,
                -0.318476867010e-05, 0.157208190040e-08, -0.306913690560e-12)),
        ),
        inverse=(
            (-210.0, 0.0, (
                0.0, 1.9528268e01, -1.2286185e00, -1.0752178e00, -5.9086933e-01,
                -1.7256713e-01, -2.8131513e-02, -2.3963370e-03, -8.3823321e-05)),
            (0.0, 760.0, (
                0.0, 1.978425e01, -2.001204e-01, 1.036969e-02, -2.549687e-04,
                3.585153e-06, -5.344285e-08, 5.099890e-10)),
            (760.0, 1200.0, (
                -3.11358187e03, 3.00543684e02, -9.94773230e00, 1.70276630e-01,
                -1.43033468e-03, 4.73886084e-06)),
        ),
    ),
    "T": _TcTable(
        forward=(
            (-270.0, 0.0, (
                0.000000000000e00, 0.387481063640e-01, 0.441944343470e-04,
                0.118443231050e-06, 0.200329735540e-07, 0.901380195590e-09,
                0.226511565930e-10, 0.360711542050e-12, 0.384939398830e-14,
                0.282135219250e-16, 0.142515947790e-18, 0.487686622860e-21,
                0.107955392700e-23, 0.139450270620e-26, 0.797951539270e-30)),
            (0.0, 400.0, (
                0.000000000000e00, 0.387481063640e-01, 0.332922278800e-04,
                0.206182434040e-06, -0.218822568460e-08, 0.109968809280e-10,
                -0.308157587720e-13, 0.454791352900e-16, -0.275129016730e-19)),
        ),
        inverse=(
            (-200.0, 0.0, (
                0.0, 2.5949192e01, -2.1316967e-01, 7.9018692e-01, 4.2527777e-01,
                1.3304473e-01, 2.0241446e-02, 1.2668171e-03)),
            (0.0, 400.0, (
                0.0, 2.592800e01, -7.602961e-01, 4.637791e-02, -2.165394e-03,
                6.048144e-05, -7.293422e-07)),
        ),
    ),
    "E": _TcTable(
        forward=(
            (-270.0, 0.0, (
                0.000000000000e00, 0.586655087080e-01, 0.454109771240e-04,
                -0.779980486860e-06, -0.258001608430e-07, -0.594525830570e-09,
                -0.932140586670e-11, -0.102876055340e-12, -0.803701236210e-15,
                -0.439794973910e-17, -0.164147763550e-19, -0.396736195160e-22,
                -0.558273287210e-25, -0.346578420130e-28)),
            (0.0, 1000.0, (
                0.000000000000e00, 0.586655087100e-01, 0.450322755820e-04,
                0.289084072120e-07, -0.330568966520e-09, 0.650244032700e-12,
                -0.191974955040e-15, -0.125366004970e-17, 0.214892175690e-20,
                -0.143880417820e-23, 0.359608994810e-27)),
        ),
        inverse=(
            (-200.0, 0.0, (
                0.0, 1.6977288e01, -4.3514970e-01, -1.5859697e-01, -9.2502871e-02,
                -2.6084314e-02, -4.1360199e-03, -3.4034030e-04, -1.1564890e-05)),
            (0.0, 1000.0, (
                0.0, 1.7057035e01, -2.3301759e-01, 6.5435585e-03, -7.3562749e-05,
                -1.7896001e-06, 8.4036165e-08, -1.3735879e-09, 1.0629823e-11,
                -3.2447087e-14)),
        ),
    ),
    "N": _TcTable(
        forward=(
            (-270.0, 0.0, (
                0.000000000000e00, 0.261591059620e-01, 0.109574842280e-04,
                -0.938411115540e-07, -0.464120397590e-10, -0.263033577160e-11,
                -0.226534380030e-13, -0.760893007910e-16, -0.934196678350e-19)),
            (0.0, 1300.0, (
                0.000000000000e00, 0.259293946010e-01, 0.157101418800e-04,
                0.438256272370e-07, -0.252611697940e-09, 0.643118193390e-12,
                -0.100634715190e-14, 0.997453389920e-18, -0.608632456070e-21,
                0.208492293390e-24, -0.306821961510e-28)),
        ),
        inverse=(
            (-200.0, 0.0, (
                0.0, 3.8436847e01, 1.1010485e00, 5.2229312e00, 7.2060525e00,
                5.8488586e00, 2.7754916e00, 7.7075166e-01, 1.1582665e-01, 7.3138868e-03)),
            (0.0, 600.0, (
                0.0, 3.86896e01, -1.08267e00, 4.70205e-02, -2.12169e-06, -1.17272e-04,
                5.39280e-06, -7.98156e-08)),
            (600.0, 1300.0, (
                1.972485e01, 3.300943e01, -3.915159e-01, 9.855391e-03, -1.274371e-04,
                7.767022e-07)),
        ),
    ),
    "R": _TcTable(
        forward=(
            (-50.0, 1064.18, (
                0.000000000000e00, 0.528961729765e-02, 0.139166589782e-04,
                -0.238855693017e-07, 0.356916001063e-10, -0.462347666298e-13,
                0.500777441034e-16, -0.373105886191e-19, 0.157716482367e-22,
                -0.281038625251e-26)),
            (1064.18, 1664.5, (
                0.295157925316e01, -0.252061251332e-02, 0.159564501865e-04,
                -0.764085947576e-08, 0.205305291024e-11, -0.293359668173e-15)),
            (1664.5, 1768.1, (
                0.152232118209e03, -0.268819888545e00, 0.171280280471e-03,
                -0.345895706453e-07, -0.934633971046e-14)),
        ),
        inverse=(
            (-50.0, 250.0, (
                0.0, 1.8891380e02, -9.3835290e01, 1.3068619e02, -2.2703580e02,
                3.5145659e02, -3.8953900e02, 2.8239471e02, -1.2607281e02, 3.1353611e01,
                -3.3187769e00)),
            (250.0, 1064.18, (
                1.334584505e01, 1.472644573e02, -1.844024844e01, 4.031129726e00,
                -6.249428360e-01, 6.468412046e-02, -4.458750426e-03, 1.994710149e-04,
                -5.313401790e-06, 6.481976217e-08)),
            (1064.18, 1664.5, (
                -8.199599416e01, 1.553962042e02, -8.342197663e00, 4.279433549e-01,
                -1.191577910e-02, 1.492290091e-04)),
            (1664.5, 1768.1, (
                3.406177836e04, -7.023729171e03, 5.582903813e02, -1.952394635e01,
                2.560740231e-01)),
        ),
    ),
    "S": _TcTable(
        forward=(
            (-50.0, 1064.18, (
                0.000000000000e00, 0.540313308631e-02, 0.125934289740e-04,
                -0.232477968689e-07, 0.322028823036e-10, -0.331465196389e-13,
                0.255744251786e-16, -0.125068871393e-19, 0.271443176145e-23)),
            (1064.18, 1664.5, (
                0.132900444085e01, 0.334509311344e-02, 0.654805192818e-05,
                -0.164856259209e-08, 0.129989605174e-13)),
            (1664.5, 1768.1, (
                0.146628232636e03, -0.258430516752e00, 0.163693574641e-03,
                -0.330439046987e-07, -0.943223690612e-14)),
        ),
        inverse=(
            (-50.0, 250.0, (
                0.0, 1.84949460e02, -8.00504062e01, 1.02237430e02, -1.52248592e02,
                1.88821343e02, -1.59085941e02, 8.23027880e01, -2.34181944e01,
                2.79786260e00)),
            (250.0, 1064.18, (
                1.291507177e01, 1.466298863e02, -1.534713402e01, 3.145945973e00,
                -4.163257839e-01, 3.187963771e-02, -1.291637500e-03, 2.183475087e-05,
                -1.447379511e-07, 8.211272125e-09)),
            (1064.18, 1664.5, (
                -8.087801117e01, 1.621573104e02, -8.536869453e00, 4.719686976e-01,
                -1.441693666e-02, 2.081618890e-04)),
            (1664.5, 1768.1, (
                5.333875126e04, -1.235892298e04, 1.092657613e03, -4.265693686e01,
                6.247205420e-01)),
        ),
    ),
    "B": _TcTable(
        forward=(
            (0.0, 630.615, (
                0.000000000000e00, -0.246508183460e-03, 0.590404211710e-05,
                -0.132579316360e-08, 0.156682919010e-11, -0.169445292400e-14,
                0.629903470940e-18)),
            (630.615, 1820.0, (
                -0.389381686210e01, 0.285717474700e-01, -0.848851047850e-04,
                0.157852801640e-06, -0.168353448640e-09, 0.111097940130e-12,
                -0.445154310330e-16, 0.989756408210e-20, -0.937913302890e-24)),
        ),
        inverse=(
            (250.0, 700.0, (
                9.8423321e01, 6.9971500e02, -8.4765304e02, 1.0052644e03, -8.3345952e02,
                4.5508542e02, -1.5523037e02, 2.9886750e01, -2.4742860e00)),
            (700.0, 1820.0, (
                2.1315071e02, 2.8510504e02, -5.2742887e01, 9.9160804e00, -1.2965303e00,
                1.1195870e-01, -6.0625199e-03, 1.8661696e-04, -2.4878585e-06)),
        ),
    ),
}

#: Thermocouple letter designations supported.
TC_TYPES: tuple[str, ...] = tuple(sorted(_TC))


def _table(tc_type: str) -> _TcTable:
    key = str(tc_type).upper()
    if key not in _TC:
        raise ValueError(f"tc_type: expected one of {', '.join(TC_TYPES)}, got {tc_type!r}")
    return _TC[key]


def tc_range_c(tc_type: str) -> tuple[float, float]:
    """Temperature range (C) of the forward reference function of a thermocouple type."""
    tab = _table(tc_type)
    return tab.forward[0][0], tab.forward[-1][1]


def tc_inverse_range_c(tc_type: str) -> tuple[float, float]:
    """Temperature range (C) over which :func:`tc_temperature_c` is defined."""
    tab = _table(tc_type)
    return tab.inverse[0][0], tab.inverse[-1][1]


def _forward_pieces(tab: _TcTable, t: np.ndarray, derivative: bool, extend: bool) -> np.ndarray:
    """Forward function (or its T-derivative) piecewise.

    extend=False: NaN outside the range; extend=True: each end range's polynomial continues past
    the range ends (used only inside the Newton polish, never returned for out-of-range input).
    """
    lo_all, hi_all = tab.forward[0][0], tab.forward[-1][1]
    conds = []
    vals = []
    n_pieces = len(tab.forward)
    for i, (lo, hi, coef) in enumerate(tab.forward):
        lo_ok = (t >= lo) if (i > 0 or not extend) else np.ones(t.shape, dtype=bool)
        last = i == n_pieces - 1
        hi_ok = (t <= hi) if last and not extend else (t < hi) if not last else np.ones(t.shape, dtype=bool)
        conds.append(lo_ok & hi_ok)
        # Evaluate each polynomial where it applies (others see a harmless in-range point).
        tt = t if extend else np.clip(t, lo, hi)
        tt = np.where(np.isfinite(tt), tt, lo)
        c = np.asarray(coef)
        v = _P.polyval(tt, _P.polyder(c) if derivative else c)
        if tab.exp_term is not None and lo >= 0.0:
            a0, a1, a2 = tab.exp_term
            d = tt - a2
            g = a0 * np.exp(a1 * d * d)
            v = v + (2.0 * a1 * d * g if derivative else g)
        vals.append(v)
    out = np.select(conds, vals, default=np.nan)
    if not extend:
        out = np.where((t >= lo_all) & (t <= hi_all), out, np.nan)
    return out


def tc_emf_mv(tc_type: str, t_c: np.ndarray | float) -> np.ndarray:
    """Thermocouple emf (mV, reference junction at 0 C) at temperature t_c (C); NaN out of range."""
    tab = _table(tc_type)
    return _forward_pieces(tab, np.asarray(t_c, dtype=np.float64), derivative=False, extend=False)


def tc_demf_dt_mv_per_c(tc_type: str, t_c: np.ndarray | float) -> np.ndarray:
    """Seebeck coefficient dE/dT (mV/C) of the reference function at t_c (C); NaN out of range."""
    tab = _table(tc_type)
    return _forward_pieces(tab, np.asarray(t_c, dtype=np.float64), derivative=True, extend=False)


def _inverse_bounds(tab: _TcTable) -> np.ndarray:
    """emf (mV) at the inverse range boundaries, from the forward function."""
    temps = [tab.inverse[0][0]] + [hi for _, hi, _ in tab.inverse]
    return _forward_pieces(tab, np.asarray(temps, dtype=np.float64), derivative=False, extend=False)


_INV_BOUNDS_MV: dict[str, np.ndarray] = {k: _inverse_bounds(v) for k, v in _TC.items()}


def tc_temperature_c(
    tc_type: str, emf_mv: np.ndarray | float, newton_steps: int = 2
) -> np.ndarray:
    """Thermocouple temperature (C) from emf (mV, reference junction at 0 C).

    The published inverse polynomial of the emf's range gives a first estimate (accurate to a
    few hundredths of a degree); ``newton_steps`` Newton steps against the forward function
    then make the result the forward function's own root (0 returns the polynomial alone).
    NaN outside the inverse range and for non-finite input.
    """
    if isinstance(newton_steps, bool) or not isinstance(newton_steps, int) or newton_steps < 0:
        raise ValueError(f"newton_steps: expected an integer >= 0, got {newton_steps!r}")
    tab = _table(tc_type)
    bounds = _INV_BOUNDS_MV[str(tc_type).upper()]
    e = np.asarray(emf_mv, dtype=np.float64)
    ok = (e >= bounds[0]) & (e <= bounds[-1])
    ee = np.where(ok, e, bounds[0])
    conds = []
    vals = []
    for i, (_, _, coef) in enumerate(tab.inverse):
        cond = (ee >= bounds[i]) & ((ee < bounds[i + 1]) if i < len(tab.inverse) - 1 else True)
        conds.append(cond)
        vals.append(_P.polyval(np.clip(ee, bounds[i], bounds[i + 1]), np.asarray(coef)))
    t = np.select(conds, vals, default=np.nan)
    for _ in range(newton_steps):
        f = _forward_pieces(tab, t, derivative=False, extend=True) - ee
        fp = _forward_pieces(tab, t, derivative=True, extend=True)
        t = t - f / fp
    return np.where(ok, t, np.nan)


def tc_temperature_with_cjc(
    tc_type: str,
    measured_emf_mv: np.ndarray | float,
    junction_t_c: np.ndarray | float,
    newton_steps: int = 2,
) -> np.ndarray:
    """Cold-junction compensation: measuring-junction temperature (C).

    ``measured_emf_mv`` is the emf at the terminals (mV), whose reference junction is at
    ``junction_t_c`` (C, e.g. from an RTD on the terminal block); the result is
    ``inverse(measured + E(junction))``. Inputs broadcast.
    """
    e_j = tc_emf_mv(tc_type, junction_t_c)
    return tc_temperature_c(
        tc_type, np.asarray(measured_emf_mv, dtype=np.float64) + e_j, newton_steps=newton_steps
    )
