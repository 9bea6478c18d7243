"""Bridge measurement math checked against independent oracles.

The main oracle is a nodal analysis of the physical Wheatstone network written here from
scratch: each gauge, lead wire and completion resistor is a separate element between named
nodes, the excitation is a fixed node voltage, and the node voltages come from
numpy.linalg.solve (with iterative refinement of the residual in extended precision, so the
oracle is accurate to double rounding). Gauge resistances come from the gauge law computed in
this file. Nothing here calls bridge.py to build the oracle.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from straind.bridge import (
    CODE_MAX,
    CODE_MIN,
    BridgeCircuit,
    BridgeInverse,
    apply_mobius,
    circuit_for,
    decode_int24_be,
    encode_int24_be,
    expected_shunt_strain,
    ratio_forward,
    ratio_from_codes,
    ratio_scale,
    ratio_with_shunt,
    saturation_mask,
    shunted_arm_ohm,
    strain_from_x,
    zero_offset,
)

LD = np.longdouble

# Strain grid: -20 000 .. +20 000 microstrain, plus small strains on a log scale.
_small = np.logspace(-9, -3, 121)
EPS_GRID = np.unique(np.concatenate([np.linspace(-0.02, 0.02, 4001), _small, -_small]))


# --------------------------------------------------------------------------- nodal oracle


def nodal_voltages(
    elements: list[tuple[str, str, np.ndarray | float]], fixed: dict[str, float]
) -> dict[str, np.ndarray]:
    """Node voltages of a resistor network, batched over k cases (one resistance array per element)."""
    # A zero-ohm element joins its two nodes into one.
    alias: dict[str, str] = {}

    def root(n: str) -> str:
        while n in alias:
            n = alias[n]
        return n

    for a, b, r in elements:
        if np.ndim(r) == 0 and float(r) == 0.0 and root(a) != root(b):
            ra, rb = root(a), root(b)
            if rb in fixed:
                ra, rb = rb, ra
            alias[rb] = ra
    named = {n for a, b, _ in elements for n in (a, b)}
    elements = [(root(a), root(b), r) for a, b, r in elements
                if not (np.ndim(r) == 0 and float(r) == 0.0)]
    nodes = sorted({n for a, b, _ in elements for n in (a, b)} | set(fixed))
    index = {n: i for i, n in enumerate(nodes)}
    k = max(np.size(r) for _, _, r in elements)
    size = len(nodes)
    g_mat = np.zeros((k, size, size), dtype=LD)
    for a, b, r in elements:
        g = 1.0 / np.broadcast_to(np.asarray(r, dtype=LD), (k,))
        i, j = index[a], index[b]
        g_mat[:, i, i] += g
        g_mat[:, j, j] += g
        g_mat[:, i, j] -= g
        g_mat[:, j, i] -= g
    fixed_idx = [index[n] for n in fixed]
    free_idx = [i for i in range(size) if i not in fixed_idx]
    v_fixed = np.array([fixed[n] for n in fixed], dtype=LD)
    a_mat = g_mat[:, free_idx][:, :, free_idx]
    rhs = -(g_mat[:, free_idx][:, :, fixed_idx] @ v_fixed)
    a64 = a_mat.astype(np.float64)
    v_free = np.linalg.solve(a64, rhs.astype(np.float64)[..., None])[..., 0].astype(LD)
    for _ in range(2):  # iterative refinement: residual in extended precision
        resid = rhs - np.einsum("kij,kj->ki", a_mat, v_free)
        v_free = v_free + np.linalg.solve(a64, resid.astype(np.float64)[..., None])[..., 0]
    volts = np.zeros((k, size), dtype=LD)
    volts[:, free_idx] = v_free
    volts[:, fixed_idx] = v_fixed
    return {n: volts[:, index[root(n)]] for n in named | set(fixed)}


def measured_ratio(elements, out_p="OP", out_n="ON", sense=("E", "G")) -> np.ndarray:
    """(V(out_p) - V(out_n)) / (V(sense+) - V(sense-)) with 1 V across E-G."""
    v = nodal_voltages(elements, {"E": 1.0, "G": 0.0})
    return ((v[out_p] - v[out_n]) / (v[sense[0]] - v[sense[1]])).astype(np.float64)


# Physical wiring of each arrangement. Our convention: R1 from OP to G, R2 from E to OP,
# R3 from E to ON, R4 from ON to G, so V(OP) - V(ON) = R1/(R1+R2) - R4/(R3+R4).

def net_quarter_2wire(eps, gf, rg, rc, rl, **_):
    gauge = rg * (1.0 + gf * eps)                       # gauge law dR/R0 = GF eps
    return [("P", "Q", gauge), ("Q", "G", rl), ("P", "OP", rl),   # both leads in the gauge loop
            ("E", "OP", rc), ("E", "ON", rc), ("ON", "G", rc)]


def net_quarter_3wire(eps, gf, rg, rc, rl, **_):
    gauge = rg * (1.0 + gf * eps)
    return [("P", "Q", gauge), ("Q", "G", rl),          # lead 1 in the gauge arm
            ("P", "M", rl), ("M", "E", rc),             # lead 2 in the adjacent completion arm
            ("P", "OP", rl),                            # lead 3: sense, carries no current
            ("E", "ON", rc), ("ON", "G", rc)]


def _net_half_adjacent(g1, g2, rc, rl):
    return [("P", "Q1", g1), ("Q1", "G", rl),           # gauge 1 (arm 1) and its lead
            ("P", "Q2", g2), ("Q2", "E", rl),           # gauge 2 (arm 2) and its lead
            ("P", "OP", rl),                            # common lead: sense only
            ("E", "ON", rc), ("ON", "G", rc)]


def net_half_bending(eps, gf, rg, rc, rl, **_):
    return _net_half_adjacent(rg * (1 + gf * eps), rg * (1 - gf * eps), rc, rl)


def net_half_poisson(eps, gf, rg, rc, rl, nu, **_):
    return _net_half_adjacent(rg * (1 + gf * eps), rg * (1 - nu * gf * eps), rc, rl)


def net_half_opposite(eps, gf, rg, rc, rl, **_):
    g = rg * (1 + gf * eps)
    return [("OP", "Q1", g), ("Q1", "G", rl), ("E", "OP", rc),
            ("E", "Q3", rl), ("Q3", "ON", g), ("ON", "G", rc)]


def _net_full_remote_sense(r1, r2, r3, r4, rl):
    # Supply leads E-T and G-U carry the excitation current; sense leads and output leads
    # carry none; the ratio is taken against the sensed voltage T-U.
    return [("E", "T", rl), ("G", "U", rl),
            ("T", "A", r2), ("A", "U", r1), ("T", "B", r3), ("B", "U", r4),
            ("A", "OP", rl), ("B", "ON", rl), ("T", "ST", rl), ("U", "SU", rl)]


def net_full_bending(eps, gf, rg, rl, **_):
    up, down = rg * (1 + gf * eps), rg * (1 - gf * eps)
    return _net_full_remote_sense(up, down, up, down, rl)


def net_full_poisson(eps, gf, rg, rl, nu, **_):
    up, down = rg * (1 + gf * eps), rg * (1 - nu * gf * eps)
    return _net_full_remote_sense(up, down, up, down, rl)


def net_arms(eps, gf, nominal, k, lead, **_):
    """Generic: each arm a gauge/resistor in series with its lead through an intermediate node."""
    ends = [("OP", "G"), ("E", "OP"), ("E", "ON"), ("ON", "G")]
    out = []
    for i, ((a, b), n, ki, li) in enumerate(zip(ends, nominal, k, lead)):
        r = n * (1.0 + ki * (gf * eps)) * np.ones_like(eps)
        if li:
            out += [(a, f"m{i}", r), (f"m{i}", b, li)]
        else:
            out.append((a, b, r))
    return out


RG, RC, RL, GF, NU = 350.0, 350.0, 5.0, 2.05, 0.3

# id, circuit_for kwargs, netlist builder, netlist kwargs, sense nodes
ARRANGEMENTS = [
    ("quarter", dict(bridge="quarter", gauge_ohm=RG), net_quarter_3wire, dict(rl=0.0), None),
    ("quarter-2wire", dict(bridge="quarter", gauge_ohm=RG, lead_ohm=RL, wiring="2-wire"),
     net_quarter_2wire, dict(rl=RL), None),
    ("quarter-3wire", dict(bridge="quarter", gauge_ohm=RG, lead_ohm=RL),
     net_quarter_3wire, dict(rl=RL), None),
    ("quarter-3wire-120-dummy", dict(bridge="quarter", gauge_ohm=120.0, completion_ohm=119.0,
                                     lead_ohm=1.5),
     net_quarter_3wire, dict(rg=120.0, rc=119.0, rl=1.5), None),
    ("half-bending-3wire", dict(bridge="half-bending", gauge_ohm=RG, lead_ohm=RL),
     net_half_bending, dict(rl=RL), None),
    ("half-poisson-3wire", dict(bridge="half-poisson", gauge_ohm=RG, lead_ohm=RL, poisson=NU),
     net_half_poisson, dict(rl=RL), None),
    ("half-opposite-3wire", dict(bridge="half-opposite", gauge_ohm=RG, lead_ohm=RL),
     net_half_opposite, dict(rl=RL), None),
    ("full-bending-sensed", dict(bridge="full-bending", gauge_ohm=RG, lead_ohm=RL),
     net_full_bending, dict(rl=RL), ("ST", "SU")),
    ("full-poisson-sensed", dict(bridge="full-poisson", gauge_ohm=RG, lead_ohm=RL, poisson=NU),
     net_full_poisson, dict(rl=RL), ("ST", "SU")),
    ("custom-3wire", dict(bridge="custom", gauge_ohm=RG, lead_ohm=RL, arms=(1, -0.3, 0.2, 0)),
     net_arms, dict(nominal=(RG,) * 4, k=(1, -0.3, 0.2, 0), lead=(RL, RL, RL, RL)), None),
]


def _oracle_ratio(builder, net_kw, sense, eps):
    kw = dict(gf=GF, rg=RG, rc=RC, rl=0.0, nu=NU)
    kw.update(net_kw)
    elements = builder(eps, **kw)
    return measured_ratio(elements, sense=sense or ("E", "G"))


@pytest.mark.parametrize("name,ckw,builder,net_kw,sense", ARRANGEMENTS, ids=[a[0] for a in ARRANGEMENTS])
def test_forward_matches_nodal_analysis(name, ckw, builder, net_kw, sense):
    # Oracle: nodal analysis of the physical network (Kirchhoff's current law), this file.
    c = circuit_for(**ckw)
    oracle = _oracle_ratio(builder, net_kw, sense, EPS_GRID)
    ours = ratio_forward(c, GF * EPS_GRID)
    assert np.max(np.abs(ours - oracle)) < 2e-15


@pytest.mark.parametrize("name,ckw,builder,net_kw,sense", ARRANGEMENTS, ids=[a[0] for a in ARRANGEMENTS])
@pytest.mark.parametrize("method,start", [("auto", "quadratic"), ("newton", "quadratic"),
                                          ("newton", "linear")])
def test_round_trip_through_nodal_network(name, ckw, builder, net_kw, sense, method, start):
    # Oracle: strain -> gauge law -> nodal solve -> ratio; the exact inverse must give the strain back.
    c = circuit_for(**ckw)
    ratio = _oracle_ratio(builder, net_kw, sense, EPS_GRID)
    inv = BridgeInverse(c, method=method, newton_start=start)
    x, ok = inv.x_from_ratio(ratio)
    assert ok.all()
    np.testing.assert_allclose(strain_from_x(x, GF), EPS_GRID, rtol=1e-9, atol=1e-15)


def test_custom_arms_with_arbitrary_leads_round_trip():
    # Oracle: nodal analysis; unequal arms and leads, a non-Moebius forward model.
    nominal, k, lead = (350.0, 349.0, 351.5, 348.0), (1.0, -0.3, 0.2, 0.0), (4.0, 3.0, 2.5, 0.5)
    c = BridgeCircuit(nominal_ohm=nominal, k=k, lead_ohm=lead)
    inv = BridgeInverse(c)
    assert inv.mobius is None and inv.method == "newton"
    ratio = measured_ratio(net_arms(EPS_GRID, GF, nominal, k, lead))
    assert np.max(np.abs(ratio_forward(c, GF * EPS_GRID) - ratio)) < 2e-15
    x, ok = inv.x_from_ratio(ratio)
    assert ok.all()
    np.testing.assert_allclose(x / GF, EPS_GRID, rtol=1e-9, atol=1e-15)


def test_inverse_keeps_shape_of_two_dimensional_blocks():
    c = circuit_for("custom", RG, arms=(1, -0.3, 0.2, 0))
    eps = np.linspace(-0.01, 0.01, 600).reshape(200, 3)
    x, ok = BridgeInverse(c).x_from_ratio(measured_ratio(net_arms(eps.ravel(), GF, (RG,) * 4,
                                                                  (1, -0.3, 0.2, 0), (0,) * 4)).reshape(200, 3))
    assert x.shape == (200, 3) and ok.shape == (200, 3) and ok.all()
    np.testing.assert_allclose(x / GF, eps, rtol=1e-9, atol=1e-15)


# --------------------------------------------------------------------------- closed forms


# Dally & Riley, Experimental Stress Analysis, 4th ed.: bridge circuits (exact forward and inverse).
TABLE = [
    ("quarter", dict(bridge="quarter"),
     lambda x, nu: x / (2 * (2 + x)), lambda v, nu: 4 * v / (1 - 2 * v)),
    ("half-bending", dict(bridge="half-bending"),
     lambda x, nu: x / 2, lambda v, nu: 2 * v),
    ("half-poisson", dict(bridge="half-poisson", poisson=NU),
     lambda x, nu: x * (1 + nu) / (2 * (2 + x * (1 - nu))),
     lambda v, nu: 4 * v / ((1 + nu) - 2 * v * (1 - nu))),
    ("half-opposite", dict(bridge="half-opposite"),
     lambda x, nu: x / (2 + x), lambda v, nu: 2 * v / (1 - v)),
    ("full-bending", dict(bridge="full-bending"),
     lambda x, nu: x, lambda v, nu: v),
    ("full-poisson", dict(bridge="full-poisson", poisson=NU),
     lambda x, nu: x * (1 + nu) / (2 + x * (1 - nu)),
     lambda v, nu: 2 * v / ((1 + nu) - v * (1 - nu))),
]


@pytest.mark.parametrize("name,ckw,fwd,inv_form", TABLE, ids=[t[0] for t in TABLE])
def test_closed_forms_forward(name, ckw, fwd, inv_form):
    # Dally & Riley, Experimental Stress Analysis, 4th ed.: forward Vr(x) for each arrangement.
    c = circuit_for(gauge_ohm=RG, **ckw)
    x = GF * EPS_GRID
    vr = ratio_forward(c, x) - ratio_forward(c, 0.0)
    # atol: a few ulps of the divider fractions (~0.5) that the difference is taken from
    np.testing.assert_allclose(vr, fwd(x, NU), rtol=1e-12, atol=5e-16)


@pytest.mark.parametrize("name,ckw,fwd,inv_form", TABLE, ids=[t[0] for t in TABLE])
@pytest.mark.parametrize("method,start", [("auto", "quadratic"), ("newton", "quadratic"),
                                          ("newton", "linear")])
def test_closed_forms_inverse(name, ckw, fwd, inv_form, method, start):
    # Dally & Riley, Experimental Stress Analysis, 4th ed.: exact inverse x(Vr), against the
    # Moebius fast path (auto) and against the Newton solver forced on the same arrangement.
    c = circuit_for(gauge_ohm=RG, **ckw)
    inv = BridgeInverse(c, method=method, newton_start=start)
    assert inv.method == ("mobius" if method == "auto" else "newton")
    vr = fwd(GF * EPS_GRID, NU)
    expected = inv_form(vr, NU)
    x, ok = inv.x_from_ratio(vr)
    assert ok.all()
    np.testing.assert_allclose(x, expected, rtol=1e-12, atol=5e-16)


@pytest.mark.parametrize("ckw", [
    dict(bridge="quarter"), dict(bridge="quarter", lead_ohm=3.0, wiring="2-wire"),
    dict(bridge="quarter", lead_ohm=3.0), dict(bridge="half-bending", lead_ohm=3.0),
    dict(bridge="half-poisson", poisson=0.28, lead_ohm=3.0),
    dict(bridge="half-opposite", lead_ohm=3.0), dict(bridge="full-bending"),
    dict(bridge="full-poisson", poisson=0.33),
    dict(bridge="quarter", completion_ohm=120.2, lead_ohm=0.7),
])
def test_standard_arrangements_have_a_moebius_inverse(ckw):
    inv = BridgeInverse(circuit_for(gauge_ohm=120.0, **ckw))
    assert inv.mobius is not None and inv.method == "mobius"


def test_quarter_moebius_coefficients_match_closed_form():
    # Dally & Riley, Experimental Stress Analysis, 4th ed.: quarter bridge x = 4 Vr / (1 - 2 Vr),
    # i.e. (a, b, c, d) proportional to (4, 0, -2, 1).
    a, b, c, d = BridgeInverse(circuit_for("quarter", 120.0)).mobius
    assert b == pytest.approx(0.0, abs=1e-15)
    assert a / d == pytest.approx(4.0, rel=1e-14)
    assert c / d == pytest.approx(-2.0, rel=1e-14)


def test_apply_mobius_broadcasts_one_coefficient_set_per_channel():
    # Oracle: each channel's own inverse; the broadcast form must agree column by column.
    circuits = [circuit_for("quarter", 350.0, lead_ohm=4.0, wiring="2-wire"),
                circuit_for("half-poisson", 120.0, poisson=0.3, lead_ohm=1.0),
                circuit_for("full-bending", 1000.0)]
    invs = [BridgeInverse(c) for c in circuits]
    coeffs = np.array([inv.mobius for inv in invs])          # (m, 4)
    lo = np.array([inv.x_domain[0] for inv in invs])
    hi = np.array([inv.x_domain[1] for inv in invs])
    rng = np.random.default_rng(7)
    x_true = rng.uniform(-0.04, 0.04, size=(500, 3))
    ratio = np.column_stack([ratio_forward(c, x_true[:, j]) for j, c in enumerate(circuits)])
    x, ok = apply_mobius(ratio, *coeffs.T, lo, hi)
    assert ok.all()
    for j, inv in enumerate(invs):
        np.testing.assert_allclose(x[:, j], inv.x_from_ratio(ratio[:, j])[0], rtol=0, atol=0)
    np.testing.assert_allclose(x, x_true, rtol=1e-9, atol=1e-15)


def test_quarter_bridge_non_linearity_rule_of_thumb():
    # Common practice: quarter bridge reads low by about x/2; eps = 1000e-6, GF = 2 gives
    # Vr = 4.995005e-4 against the linear 5.0e-4.
    eps = np.array([1000e-6])
    c = circuit_for("quarter", 120.0)
    vr = ratio_forward(c, 2.0 * eps)[0]
    assert vr == pytest.approx(4.995005e-4, abs=5e-11)
    assert measured_ratio(net_quarter_3wire(eps, 2.0, 120.0, 120.0, 0.0))[0] == pytest.approx(4.995005e-4, abs=5e-11)
    assert 2.0 * eps[0] / 4 == pytest.approx(5.0e-4)
    assert (5.0e-4 - vr) / 5.0e-4 == pytest.approx(1e-3, rel=1e-3)  # about 0.1 %


# --------------------------------------------------------------------------- lead wires


def test_three_wire_lead_formula():
    # Window, Strain Gauge Technology, 2nd ed.: 3-wire quarter bridge, x = 4 Vr (1+r) / (1 - 2 Vr).
    rg, rl, gf = 120.0, 2.0, 2.0
    r = rl / rg
    c = circuit_for("quarter", rg, lead_ohm=rl, wiring="3-wire")
    vr = measured_ratio(net_quarter_3wire(EPS_GRID, gf, rg, rg, rl))
    x, ok = BridgeInverse(c).x_from_ratio(vr)
    assert ok.all()
    np.testing.assert_allclose(x, 4 * vr * (1 + r) / (1 - 2 * vr), rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(x / gf, EPS_GRID, rtol=1e-9, atol=1e-15)


def test_three_wire_zero_does_not_shift_two_wire_zero_does():
    # Window, Strain Gauge Technology, 2nd ed.: the 3-wire connection keeps the zero; 2-wire shifts it.
    zero = np.array([0.0])
    rg, rl = 350.0, 5.0
    three = measured_ratio(net_quarter_3wire(zero, 2.0, rg, rg, rl))[0]
    two = measured_ratio(net_quarter_2wire(zero, 2.0, rg, rg, rl))[0]
    assert abs(three) < 1e-16
    assert abs(ratio_forward(circuit_for("quarter", rg, lead_ohm=rl), 0.0)) < 1e-16
    assert two > 1e-3  # a 10 ohm loop on 350 ohm: several mV/V of false zero
    assert ratio_forward(circuit_for("quarter", rg, lead_ohm=rl, wiring="2-wire"), 0.0) == pytest.approx(two, abs=1e-16)


def test_two_wire_desensitisation_first_order():
    # Window, Strain Gauge Technology, 2nd ed.: a 2-wire quarter bridge reads low by about
    # Rg / (Rg + 2 RL) (first order in r = RL/Rg); a naive quarter inverse of the tared ratio
    # shows it, while the exact inverse does not.
    rg, rl, gf = 120.0, 1.0, 2.0
    r = rl / rg
    eps = np.array([0.0, 10e-6])
    ratio = measured_ratio(net_quarter_2wire(eps, gf, rg, rg, rl))
    vr = ratio[1] - ratio[0]
    naive = 4 * vr / (1 - 2 * vr) / gf
    assert abs(naive / eps[1] - 1 / (1 + 2 * r)) < 2 * r * r
    c = circuit_for("quarter", rg, lead_ohm=rl, wiring="2-wire")
    x, ok = BridgeInverse(c).x_from_ratio(ratio)
    assert ok.all()
    np.testing.assert_allclose(x / gf, eps, rtol=1e-9, atol=1e-15)


def test_circuit_for_lead_placement():
    # Our wiring convention (circuit_for's docstring): where each arrangement's leads sit.
    def leads(**kw):
        return circuit_for(gauge_ohm=120.0, lead_ohm=2.0, **kw).lead_ohm
    assert leads(bridge="quarter", wiring="2-wire") == (4.0, 0.0, 0.0, 0.0)
    assert leads(bridge="quarter") == (2.0, 2.0, 0.0, 0.0)
    assert leads(bridge="half-bending") == (2.0, 2.0, 0.0, 0.0)
    assert leads(bridge="half-poisson", poisson=0.3) == (2.0, 2.0, 0.0, 0.0)
    assert leads(bridge="half-opposite") == (2.0, 0.0, 2.0, 0.0)
    assert leads(bridge="full-bending") == (0.0, 0.0, 0.0, 0.0)
    assert leads(bridge="full-poisson", poisson=0.3) == (0.0, 0.0, 0.0, 0.0)
    # custom: 3-wire per half bridge (each half with an active gauge has a lead in both arms)
    assert leads(bridge="custom", arms=(1, 0, -1, 0)) == (2.0, 2.0, 2.0, 2.0)
    assert leads(bridge="custom", arms=(1, 0, 0, 0)) == (2.0, 2.0, 0.0, 0.0)
    assert leads(bridge="custom", arms=(1, -1, 1, -0.5)) == (0.0, 0.0, 0.0, 0.0)
    c = circuit_for("quarter", 350.0, completion_ohm=349.5)
    assert c.nominal_ohm == (350.0, 349.5, 349.5, 349.5) and c.k == (1.0, 0.0, 0.0, 0.0)
    c = circuit_for("half-poisson", 350.0, completion_ohm=349.5, poisson=0.3)
    assert c.nominal_ohm == (350.0, 350.0, 349.5, 349.5) and c.k == (1.0, -0.3, 0.0, 0.0)
    assert circuit_for("full-poisson", 350.0, poisson=0.3).k == (1.0, -0.3, 1.0, -0.3)
    assert circuit_for("half-opposite", 350.0, completion_ohm=300.0).nominal_ohm == (350.0, 300.0, 350.0, 300.0)


@pytest.mark.parametrize("kwargs,match", [
    (dict(bridge="eighth", gauge_ohm=120.0), "bridge"),
    (dict(bridge="quarter", gauge_ohm=0.0), "gauge_ohm"),
    (dict(bridge="quarter", gauge_ohm=120.0, completion_ohm=-1.0), "completion_ohm"),
    (dict(bridge="quarter", gauge_ohm=120.0, lead_ohm=-0.1), "lead_ohm"),
    (dict(bridge="quarter", gauge_ohm=120.0, lead_ohm=float("nan")), "lead_ohm"),
    (dict(bridge="quarter", gauge_ohm=120.0, wiring="4-wire"), "wiring"),
    (dict(bridge="half-bending", gauge_ohm=120.0, wiring="2-wire"), "wiring"),
    (dict(bridge="full-bending", gauge_ohm=120.0, wiring="2-wire"), "wiring"),
    (dict(bridge="custom", gauge_ohm=120.0, wiring="2-wire", arms=(1, 0, 0, 0)), "wiring"),
    (dict(bridge="half-poisson", gauge_ohm=120.0), "poisson"),
    (dict(bridge="full-poisson", gauge_ohm=120.0), "poisson"),
    (dict(bridge="full-poisson", gauge_ohm=120.0, poisson=0.7), "poisson"),
    (dict(bridge="quarter", gauge_ohm=120.0, poisson=0.3), "poisson"),
    (dict(bridge="custom", gauge_ohm=120.0), "arms"),
    (dict(bridge="custom", gauge_ohm=120.0, arms=(1, 0, 0)), "arms"),
    (dict(bridge="custom", gauge_ohm=120.0, arms=(0, 0, 0, 0)), "arms"),
    (dict(bridge="custom", gauge_ohm=120.0, arms=(1, 0, float("inf"), 0)), "arms"),
    (dict(bridge="quarter", gauge_ohm=120.0, arms=(1, 0, 0, 0)), "arms"),
    (dict(bridge="full-bending", gauge_ohm=120.0, completion_ohm=100.0), "completion_ohm"),
])
def test_circuit_for_rejects_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        circuit_for(**kwargs)


def test_full_bridge_ignores_lead_ohm_and_accepts_matching_completion():
    a = circuit_for("full-bending", 350.0, lead_ohm=7.0, completion_ohm=350.0)
    assert a == circuit_for("full-bending", 350.0)


@pytest.mark.parametrize("kwargs,match", [
    (dict(nominal_ohm=(1, 1, 1), k=(1, 0, 0, 0)), "nominal_ohm"),
    (dict(nominal_ohm=(1, 1, 0, 1), k=(1, 0, 0, 0)), "nominal_ohm"),
    (dict(nominal_ohm=(1, 1, 1, 1), k=(1, 0, 0, 0), lead_ohm=(0, -1, 0, 0)), "lead_ohm"),
    (dict(nominal_ohm=(1, 1, 1, 1), k=(0, 0, 0, 0)), "k"),
    (dict(nominal_ohm=(1, 1, 1, 1), k=(1, float("nan"), 0, 0)), "k"),
])
def test_bridge_circuit_validation(kwargs, match):
    with pytest.raises(ValueError, match=match):
        BridgeCircuit(**kwargs)


# --------------------------------------------------------------------------- inverse edge cases


def test_no_physical_solution_is_nan_and_not_ok():
    # Quarter bridge: V -> 1/2 as R1 -> infinity, V = -1/2 at R1 = 0 (derived from the divider).
    for method in ("auto", "newton"):
        inv = BridgeInverse(circuit_for("quarter", 120.0), method=method)
        x, ok = inv.x_from_ratio(np.array([0.6, 0.5, -0.6, np.nan, np.inf, 1e-3]))
        assert ok.tolist() == [False, False, False, False, False, True]
        assert np.isnan(x[:5]).all() and np.isfinite(x[5])
    inv = BridgeInverse(circuit_for("custom", 120.0, arms=(1, -0.3, 0.2, 0)))
    x, ok = inv.x_from_ratio(np.array([0.9, -0.9, np.nan, 2e-3]))
    assert ok.tolist() == [False, False, False, True]
    assert np.isnan(x[:3]).all()


@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_non_monotone_custom_bridge_stays_on_the_branch_through_zero(sign):
    # Arms 1 and 4 both active (k = 1, 0.5), equal nominals, no leads:
    # V(x) = (1+x)/(2+x) - (1+x/2)/(2+x/2), derived by hand from the divider convention; V rises,
    # peaks where (2 + x/2)^2 = (2 + x)^2 / 2, i.e. at x = 2*sqrt(2), then falls back towards 0.
    # sign = -1 mirrors it (k = -1, -0.5): falling output, peak at x = -2*sqrt(2).
    def v_hand(x):
        u = sign * x
        return (1 + u) / (2 + u) - (1 + u / 2) / (2 + u / 2)

    peak = sign * 2 * math.sqrt(2)
    inv = BridgeInverse(BridgeCircuit((350.0,) * 4, (sign, 0.0, 0.0, 0.5 * sign)))
    assert inv.method == "newton"
    assert inv.x_branch[0 if sign < 0 else 1] == pytest.approx(peak, rel=1e-9)
    x_true = sign * np.linspace(-0.9, 2.7, 2001)
    x, ok = inv.x_from_ratio(v_hand(x_true))
    assert ok.all()
    np.testing.assert_allclose(x, x_true, rtol=1e-9, atol=1e-15)
    # x = 5 lies past the peak; the same ratio is reached on the branch through zero.
    xs, ok = inv.x_from_ratio(np.array([v_hand(sign * 5.0), v_hand(peak) + 1e-6]))
    assert ok.tolist() == [True, False]
    assert abs(xs[0]) < 2 * math.sqrt(2) and v_hand(xs[0]) == pytest.approx(v_hand(sign * 5.0), abs=1e-15)


def test_inverse_rejects_circuit_without_strain_response():
    # R1 and R4 change alike with equal nominals: both dividers move together, V(x) = 0.
    with pytest.raises(ValueError, match="circuit"):
        BridgeInverse(BridgeCircuit((350.0,) * 4, (1.0, 0.0, 0.0, 1.0)))
    with pytest.raises(ValueError, match="method"):
        BridgeInverse(circuit_for("custom", 350.0, arms=(1, -0.3, 0.2, 0)), method="mobius")
    with pytest.raises(ValueError, match="method"):
        BridgeInverse(circuit_for("quarter", 350.0), method="secant")
    with pytest.raises(ValueError, match="newton_start"):
        BridgeInverse(circuit_for("quarter", 350.0), newton_start="cubic")


# --------------------------------------------------------------------------- tare


def test_tare_maps_the_tare_instant_to_zero_strain():
    # Oracle: nodal network with an unmodelled imbalance (completion arm 3 off by 0.2 ohm) that
    # the circuit model does not know about; the tare absorbs it.
    rg, rl, gf = 350.0, 5.0, 2.0
    c = circuit_for("quarter", rg, lead_ohm=rl, wiring="2-wire")

    def network(eps):
        el = net_quarter_2wire(eps, gf, rg, rg, rl)
        return measured_ratio([(a, b, (r + 0.2 if (a, b) == ("E", "ON") else r)) for a, b, r in el])

    eps = np.linspace(-0.005, 0.005, 101)
    at_tare = network(np.array([0.0]))[0]
    offset = zero_offset(at_tare, c)
    assert offset == pytest.approx(at_tare - ratio_forward(c, 0.0)[()], abs=0)
    inv = BridgeInverse(c)
    x, ok = inv.x_from_ratio(network(eps) - offset)
    assert ok.all()
    # The imbalance is tiny, so the recovered strain is close to truth (not exact: the offset
    # is subtracted in ratio, not in resistance).
    np.testing.assert_allclose(x / gf, eps, rtol=1e-4, atol=1e-12)
    x0, _ = inv.x_from_ratio(np.array([at_tare]) - offset)
    assert abs(x0[0]) < 1e-15
    # Tare taken under a load: that load reads as zero afterwards.
    loaded = network(np.array([1e-3]))[0]
    x1, _ = inv.x_from_ratio(np.array([loaded]) - zero_offset(loaded, c))
    assert abs(x1[0]) < 1e-15


# --------------------------------------------------------------------------- shunt calibration


@pytest.mark.parametrize("rg,rs", [(120.0, 59_880.0), (350.0, 174_650.0)])
def test_shunt_worked_values(rg, rs):
    # Common practice: Rg 120, GF 2.0, Rs 59 880 -> -1000 microstrain; Rg 350, Rs 174 650 -> -1000.
    c = circuit_for("quarter", rg)
    assert expected_shunt_strain(c, 2.0, rs, 1) * 1e6 == pytest.approx(-1000.0, rel=1e-12)
    # Window, Strain Gauge Technology, 2nd ed.: eps_sim = -Rg / (GF (Rg + Rs)).
    assert expected_shunt_strain(c, 2.0, rs, 1) == pytest.approx(-rg / (2.0 * (rg + rs)), rel=1e-12)


def test_shunt_on_adjacent_arm_simulates_tension():
    # Common practice: a shunt on the adjacent completion arm simulates tension. Derived by hand
    # from the divider: R1/(R1+R2') = 1/2 ... gives x = Rg/Rs for equal arms.
    rg, rs, gf = 120.0, 59_880.0, 2.0
    c = circuit_for("quarter", rg)
    assert expected_shunt_strain(c, gf, rs, 2) == pytest.approx(rg / (gf * rs), rel=1e-12)
    assert expected_shunt_strain(c, gf, rs, 4) == pytest.approx(rg / (gf * rs), rel=1e-12)
    assert expected_shunt_strain(c, gf, rs, 3) < 0


def test_shunt_ratio_against_nodal_network_with_leads():
    # Oracle: nodal analysis of the 3-wire quarter bridge with the shunt as a network element:
    # across the gauge and its lead (P to G) or across the gauge alone (P to Q).
    rg, rl, rs = 350.0, 5.0, 100_000.0
    c = circuit_for("quarter", rg, lead_ohm=rl)
    base = net_quarter_3wire(np.array([0.0]), 2.0, rg, rg, rl)
    whole = measured_ratio(base + [("P", "G", rs)])[0]
    gauge_only = measured_ratio(base + [("P", "Q", rs)])[0]
    assert ratio_with_shunt(c, rs, 1) == pytest.approx(whole, abs=2e-16)
    assert ratio_with_shunt(c, rs, 1, include_lead=False) == pytest.approx(gauge_only, abs=2e-16)
    # The strain it simulates, seen by the exact inverse, through the same oracle ratio.
    x, _ = BridgeInverse(c).x_from_ratio(np.array([whole]))
    assert expected_shunt_strain(c, 2.0, rs, 1) == pytest.approx(x[0] / 2.0, rel=1e-12)


def test_shunted_arm_and_errors():
    assert shunted_arm_ohm(120.0, 59_880.0) == pytest.approx(120.0 * 59_880.0 / 60_000.0, rel=1e-15)
    np.testing.assert_allclose(shunted_arm_ohm(np.array([100.0, 200.0]), 100.0), [50.0, 200 / 3])
    with pytest.raises(ValueError, match="shunt_ohm"):
        shunted_arm_ohm(120.0, 0.0)
    with pytest.raises(ValueError, match="arm"):
        expected_shunt_strain(circuit_for("quarter", 120.0), 2.0, 1e5, 5)
    with pytest.raises(ValueError, match="shunt_ohm"):
        expected_shunt_strain(circuit_for("quarter", 120.0), 2.0, -5.0, 1)
    # A ratio beyond the peak of a non-monotone custom bridge has no strain on its branch.
    with pytest.raises(ValueError, match="no physical strain"):
        expected_shunt_strain(BridgeCircuit((350.0,) * 4, (1.0, 0.0, 0.0, 0.5)), 2.0, 10.0, 2)


# --------------------------------------------------------------------------- gauge law


def test_linear_gauge_law():
    x = np.array([-0.04, 0.0, 2e-3])
    np.testing.assert_array_equal(strain_from_x(x, 2.0), x / 2.0)


@pytest.mark.parametrize("gf1,gf2", [(120.0, 4000.0), (-80.0, 3000.0), (150.0, -6000.0)])
def test_semiconductor_quadratic_gauge_law(gf1, gf2):
    # Gauge law dR/R0 = GF1 eps + GF2 eps^2 (semiconductor gauges), forward computed directly.
    eps = np.linspace(-3000e-6, 3000e-6, 6001)
    x = gf1 * eps + gf2 * eps ** 2
    np.testing.assert_allclose(strain_from_x(x, gf1, gf2), eps, rtol=1e-12, atol=1e-18)


def test_quadratic_gauge_law_is_stable_for_tiny_gf2():
    # The textbook form (-GF + sqrt(GF^2 + 4 gf2 x)) / (2 gf2) loses every digit here.
    x = np.array([1e-3, -2e-3, 1e-7])
    eps = strain_from_x(x, 2.0, 1e-12)
    np.testing.assert_allclose(eps, x / 2.0, rtol=1e-11)


def test_quadratic_gauge_law_without_real_root_is_nan():
    # GF eps + gf2 eps^2 = x has no real root when GF^2 + 4 gf2 x < 0.
    eps = strain_from_x(np.array([-1.0, 0.001]), 100.0, 3000.0)
    assert np.isnan(eps[0]) and np.isfinite(eps[1])
    with pytest.raises(ValueError, match="gauge_factor"):
        strain_from_x(np.array([1.0]), 0.0)
    with pytest.raises(ValueError, match="gf2"):
        strain_from_x(np.array([1.0]), 2.0, float("nan"))


# --------------------------------------------------------------------------- converter codes


EDGE_WORDS = [0x000000, 0x000001, 0xFFFFFF, 0x7FFFFF, 0x800000, 0x7FFFFE, 0x800001,
              0x000080, 0x0000FF, 0x008000, 0x00FF00, 0x800080, 0xFF7FFF, 0xFFFF80,
              0x123456, 0xABCDEF, 0x7F0000, 0x80FFFF]


def test_decode_edge_codes_against_int_from_bytes():
    # Python's int.from_bytes(..., "big", signed=True) is the oracle for two's complement.
    raw = b"".join(w.to_bytes(3, "big") for w in EDGE_WORDS)
    expected = [int.from_bytes(w.to_bytes(3, "big"), "big", signed=True) for w in EDGE_WORDS]
    got = decode_int24_be(raw)
    assert got.dtype == np.int32
    assert got.tolist() == expected
    assert expected[:5] == [0, 1, -1, 8388607, -8388608]  # spot check of the oracle itself
    assert decode_int24_be(bytearray(raw)).tolist() == expected
    assert decode_int24_be(memoryview(raw)).tolist() == expected
    assert decode_int24_be(np.frombuffer(raw, np.uint8).reshape(-1, 3)).tolist() == expected


def test_decode_random_sweep_and_encode_round_trip():
    rng = np.random.default_rng(2024)
    raw = rng.integers(0, 256, size=3 * 20_000, dtype=np.uint8).tobytes()
    expected = [int.from_bytes(raw[i:i + 3], "big", signed=True) for i in range(0, len(raw), 3)]
    codes = decode_int24_be(raw)
    assert codes.tolist() == expected
    assert encode_int24_be(codes) == raw
    assert encode_int24_be([CODE_MIN, -1, 0, CODE_MAX]) == bytes.fromhex("800000ffffff0000007fffff")
    assert decode_int24_be(b"").size == 0


def test_decode_encode_errors():
    with pytest.raises(ValueError, match="buf"):
        decode_int24_be(b"\x00\x01")
    with pytest.raises(ValueError, match="buf"):
        decode_int24_be(np.zeros(3, dtype=np.int16))
    with pytest.raises(ValueError, match="codes"):
        encode_int24_be([CODE_MAX + 1])
    with pytest.raises(ValueError, match="codes"):
        encode_int24_be([CODE_MIN - 1])
    with pytest.raises(ValueError, match="codes"):
        encode_int24_be(np.array([0.5]))


def test_saturation_mask_flags_exactly_the_two_full_scale_codes():
    # Our convention: 0x7FFFFF and 0x800000 mean at or beyond full scale.
    codes = np.array([int.from_bytes(w.to_bytes(3, "big"), "big", signed=True) for w in EDGE_WORDS],
                     dtype=np.int32)
    mask = saturation_mask(codes)
    assert sorted(codes[mask].tolist()) == [-8388608, 8388607]
    assert mask.sum() == 2
    block = np.array([[0, CODE_MAX], [CODE_MIN, CODE_MAX - 1]], dtype=np.int32)
    assert saturation_mask(block).tolist() == [[False, True], [True, False]]


def test_ratio_scale_values():
    # Our project's measurement reference: at G = 128 one code is 9.31e-10 V/V, about
    # 0.0019 microstrain on a GF 2 quarter bridge; full scale is 7.8 mV/V.
    s = ratio_scale(128)
    assert s == pytest.approx(9.31e-10, abs=0.005e-10)
    assert s == 1.0 / (2 ** 23 * 128)
    assert CODE_MAX * s * 1e3 == pytest.approx(7.8, abs=0.05)
    assert 4 * s / 2.0 * 1e6 == pytest.approx(0.0019, abs=0.00005)
    assert ratio_scale(1) == 2.0 ** -23
    # external reference: code measures volts against vref; divide by the excitation
    assert ratio_scale(64, "external", vref_v=2.5, excitation_v=5.0) == pytest.approx(0.5 * ratio_scale(64), rel=1e-15)


@pytest.mark.parametrize("args,kwargs,match", [
    ((0,), {}, "gain"), ((3.5,), {}, "gain"), ((True,), {}, "gain"), ((-8,), {}, "gain"),
    ((128, "internal"), {}, "reference"),
    ((128, "external"), dict(excitation_v=5.0), "vref_v"),
    ((128, "external"), dict(vref_v=0.0, excitation_v=5.0), "vref_v"),
    ((128, "external"), dict(vref_v=2.5), "excitation_v"),
    ((128, "external"), dict(vref_v=2.5, excitation_v=float("inf")), "excitation_v"),
])
def test_ratio_scale_rejects_bad_input(args, kwargs, match):
    with pytest.raises(ValueError, match=match):
        ratio_scale(*args, **kwargs)


def test_ratio_from_codes_never_scales_saturated_codes():
    codes = np.array([[100, CODE_MAX], [CODE_MIN, -100]], dtype=np.int32)
    scale = np.array([ratio_scale(128), ratio_scale(64)])
    ratio, sat = ratio_from_codes(codes, scale)
    assert sat.tolist() == [[False, True], [True, False]]
    assert np.isnan(ratio[sat]).all()
    assert ratio[0, 0] == 100 * scale[0] and ratio[1, 1] == -100 * scale[1]
