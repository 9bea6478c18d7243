"""Rosette reduction and plane stress checked against independent computations.

Oracle: a known strain tensor E = [[ex, gxy/2], [gxy/2, ey]]; a gauge along the unit vector n
reads n^T E n (tensor transformation written here, not the cos^2 form of the module), with
transverse sensitivity the reading of ASTM E251 uses the perpendicular unit vector p.
Principal values and directions come from numpy.linalg.eigh of E; stresses from solving the
compliance relations of plane stress with numpy.linalg.solve.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from straind.rosette import (
    DELTA_DEG,
    RECTANGULAR_DEG,
    correct_transverse,
    correct_transverse_rectangular,
    delta,
    gauge_strains,
    principal,
    principal_stresses,
    rectangular,
    strain_tensor_from_gauges,
    tresca,
    uniaxial_stress,
    von_mises,
)

NU0 = 0.285


def random_tensors(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    ex, ey, gxy = rng.uniform(-3000, 3000, (3, n))
    tensor = np.empty((n, 2, 2))
    tensor[:, 0, 0], tensor[:, 1, 1] = ex, ey
    tensor[:, 0, 1] = tensor[:, 1, 0] = gxy / 2
    return ex, ey, gxy, tensor


def readings_oracle(tensor: np.ndarray, angles_deg, kt=0.0) -> np.ndarray:
    """n^T E n for each gauge direction; with Kt: (n^T E n + Kt p^T E p) / (1 - nu0 Kt)."""
    th = np.deg2rad(np.asarray(angles_deg, dtype=float))
    nvec = np.stack([np.cos(th), np.sin(th)], -1)          # (3, 2)
    pvec = np.stack([-np.sin(th), np.cos(th)], -1)         # perpendicular, in the gauge plane
    along = np.einsum("gi,kij,gj->kg", nvec, tensor, nvec)
    across = np.einsum("gi,kij,gj->kg", pvec, tensor, pvec)
    k = np.broadcast_to(np.asarray(kt, dtype=float), (3,))
    return (along + k * across) / (1 - NU0 * k)


def eig_oracle(tensor: np.ndarray):
    """numpy.linalg.eigh: (e1, e2, angle of the e1 eigenvector in degrees)."""
    w, v = np.linalg.eigh(tensor)                 # ascending
    e1, e2 = w[:, 1], w[:, 0]
    ang = np.degrees(np.arctan2(v[:, 1, 1], v[:, 0, 1]))
    return e1, e2, ang


def angle_diff_mod180(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Difference of two directions (defined modulo 180 deg), in [-90, 90)."""
    return (np.asarray(a) - np.asarray(b) + 90.0) % 180.0 - 90.0


def check_against_eigh(e1, e2, theta, gmax, tensor, tol=1e-9):
    o1, o2, oang = eig_oracle(tensor)
    scale = 3000.0
    np.testing.assert_allclose(e1, o1, rtol=0, atol=tol * scale)
    np.testing.assert_allclose(e2, o2, rtol=0, atol=tol * scale)
    np.testing.assert_allclose(gmax, o1 - o2, rtol=0, atol=2 * tol * scale)
    assert np.all(theta > -90.0) and np.all(theta <= 90.0)
    separated = (o1 - o2) > 1e-3 * scale          # directions are defined when e1 != e2
    assert separated.mean() > 0.95
    d = angle_diff_mod180(theta[separated], oang[separated])
    assert np.max(np.abs(d)) < 1e-6


ANGLE_SETS = [RECTANGULAR_DEG, DELTA_DEG, (0.0, 120.0, 240.0), (10.0, 55.0, 130.0),
              (-30.0, 15.0, 75.0), (0.0, 30.0, 90.0)]


@pytest.mark.parametrize("angles", ANGLE_SETS)
def test_tensor_and_principal_from_any_three_gauges(angles):
    ex, ey, gxy, tensor = random_tensors(2000, seed=11)
    r = readings_oracle(tensor, angles)
    tx, ty, tg = strain_tensor_from_gauges(r, angles)
    # Dally & Riley, Experimental Stress Analysis: three gauges determine (ex, ey, gxy)
    np.testing.assert_allclose(tx, ex, atol=1e-8)
    np.testing.assert_allclose(ty, ey, atol=1e-8)
    np.testing.assert_allclose(tg, gxy, atol=1e-8)
    # principal strains/directions against numpy.linalg.eigh of the known tensor
    check_against_eigh(*principal(tx, ty, tg), tensor)


def test_random_angle_triples():
    rng = np.random.default_rng(5)
    ex, ey, gxy, tensor = random_tensors(200, seed=12)
    done = 0
    while done < 20:
        angles = rng.uniform(-90, 270, 3)
        c = np.cos(np.deg2rad(angles))
        s = np.sin(np.deg2rad(angles))
        if np.linalg.cond(np.stack([c * c, s * s, s * c], -1)) > 50:   # poorly conditioned layout
            continue
        r = readings_oracle(tensor, angles)
        check_against_eigh(*principal(*strain_tensor_from_gauges(r, angles)), tensor, tol=1e-8)
        done += 1


def test_closed_forms_rectangular_and_delta():
    _, _, _, tensor = random_tensors(2000, seed=13)
    ra, rb, rc = readings_oracle(tensor, RECTANGULAR_DEG).T
    # ASTM E1561 / Dally & Riley: rectangular rosette closed form
    check_against_eigh(*rectangular(ra, rb, rc), tensor)
    da, db, dc = readings_oracle(tensor, DELTA_DEG).T
    # ASTM E1561 / Dally & Riley: delta rosette closed form
    check_against_eigh(*delta(da, db, dc), tensor)


def test_closed_forms_agree_with_general_solution():
    rng = np.random.default_rng(17)
    g = rng.uniform(-2500, 2500, (1000, 3))
    for closed, angles in ((rectangular, RECTANGULAR_DEG), (delta, DELTA_DEG)):
        general = principal(*strain_tensor_from_gauges(g, angles))
        fast = closed(g[:, 0], g[:, 1], g[:, 2])
        for a, b in zip(general, fast):
            np.testing.assert_allclose(a, b, rtol=0, atol=1e-7)


@pytest.mark.parametrize("angles", [RECTANGULAR_DEG, DELTA_DEG, (10.0, 55.0, 130.0)])
@pytest.mark.parametrize("kt", [0.03, -0.02, (0.01, 0.04, -0.03)])
def test_transverse_sensitivity_forward_then_correct(angles, kt):
    ex, ey, gxy, tensor = random_tensors(1000, seed=21)
    r_hat = readings_oracle(tensor, angles, kt)        # ASTM E251 reading model
    # without correction the tensor is wrong by a visible amount
    ux, _, _ = strain_tensor_from_gauges(r_hat, angles)
    assert np.max(np.abs(ux - ex)) > 5.0
    tx, ty, tg = strain_tensor_from_gauges(r_hat, angles, kt=kt)
    np.testing.assert_allclose(tx, ex, atol=1e-8)
    np.testing.assert_allclose(ty, ey, atol=1e-8)
    np.testing.assert_allclose(tg, gxy, atol=1e-8)
    true_readings = readings_oracle(tensor, angles)
    np.testing.assert_allclose(correct_transverse(r_hat, angles, kt), true_readings, atol=1e-8)


def test_rectangular_transverse_closed_form():
    _, _, _, tensor = random_tensors(1000, seed=22)
    kt = 0.035
    r_hat = readings_oracle(tensor, RECTANGULAR_DEG, kt)
    true = readings_oracle(tensor, RECTANGULAR_DEG)
    # standard rectangular-rosette correction (common practice, equal Kt in all three gauges)
    got = np.stack(correct_transverse_rectangular(r_hat[:, 0], r_hat[:, 1], r_hat[:, 2], kt), -1)
    np.testing.assert_allclose(got, true, atol=1e-8)


def test_gauge_strains_forward_model():
    ex, ey, gxy, tensor = random_tensors(100, seed=23)
    np.testing.assert_allclose(gauge_strains(ex, ey, gxy, (5.0, 50.0, 95.0)),
                               readings_oracle(tensor, (5.0, 50.0, 95.0)), atol=1e-9)


def test_principal_angle_convention():
    # x larger: e1 along x; y larger: e1 along y -> +90 (never -90), also for a -0.0 shear
    assert principal(100.0, 0.0, 0.0)[2] == 0.0
    assert principal(0.0, 100.0, 0.0)[2] == 90.0
    assert principal(0.0, 100.0, -0.0)[2] == 90.0
    # pure shear gxy > 0: e1 at +45 deg (Mohr's circle, Dally & Riley)
    e1, e2, th, gm = principal(0.0, 0.0, 200.0)
    assert (e1, e2, th, gm) == pytest.approx((100.0, -100.0, 45.0, 200.0))
    assert principal(0.0, 0.0, -200.0)[2] == pytest.approx(-45.0)
    # a block keeps its shape
    assert principal(np.zeros((4, 5)), np.ones((4, 5)), np.ones((4, 5)))[0].shape == (4, 5)


def test_degenerate_angles_rejected():
    with pytest.raises(ValueError):
        strain_tensor_from_gauges(np.zeros((2, 3)), (0.0, 90.0, 180.0))
    with pytest.raises(ValueError):
        strain_tensor_from_gauges(np.zeros((2, 2)), RECTANGULAR_DEG)
    with pytest.raises(ValueError):
        strain_tensor_from_gauges(np.zeros((2, 3)), RECTANGULAR_DEG, kt=1.2)


# --------------------------------------------------------------------------- stresses

def test_steel_uniaxial_handbook_example():
    # Handbook structural steel (common practice): E = 200 GPa, nu = 0.3. A bar under 200 MPa
    # uniaxial stress strains 200/200000 = 1000 microstrain along and -300 across.
    e_mpa, nu = 200_000.0, 0.3
    s1, s2 = principal_stresses(1000.0, -300.0, e_mpa, nu)
    assert s1 == pytest.approx(200.0, rel=1e-12)
    assert s2 == pytest.approx(0.0, abs=1e-9)
    assert uniaxial_stress(1000.0, e_mpa) == pytest.approx(200.0, rel=1e-15)
    assert von_mises(s1, s2) == pytest.approx(200.0, rel=1e-12)
    assert tresca(s1, s2) == pytest.approx(200.0, rel=1e-12)


def test_plane_stress_against_compliance_solve():
    rng = np.random.default_rng(31)
    for e_mpa, nu in ((200_000.0, 0.3), (70_000.0, 0.33)):   # steel, aluminium (common practice)
        e1, e2 = rng.uniform(-2000, 2000, (2, 300))
        # compliance of plane stress: eps = (1/E) [[1, -nu], [-nu, 1]] sigma, solved for sigma
        comp = np.array([[1.0, -nu], [-nu, 1.0]]) / e_mpa
        sig = np.linalg.solve(comp, np.stack([e1, e2]) * 1e-6)
        s1, s2 = principal_stresses(e1, e2, e_mpa, nu)
        np.testing.assert_allclose(s1, sig[0], rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(s2, sig[1], rtol=1e-12, atol=1e-9)


def test_von_mises_and_tresca_special_states():
    # common practice yield criteria: pure shear tau -> von Mises sqrt(3) tau, Tresca 2 tau;
    # equibiaxial s -> both s; same-sign biaxial: Tresca uses the zero out-of-plane stress
    assert von_mises(50.0, -50.0) == pytest.approx(math.sqrt(3) * 50.0)
    assert tresca(50.0, -50.0) == pytest.approx(100.0)
    assert von_mises(80.0, 80.0) == pytest.approx(80.0)
    assert tresca(80.0, 80.0) == pytest.approx(80.0)
    assert tresca(100.0, 40.0) == pytest.approx(100.0)
    assert tresca(-100.0, -40.0) == pytest.approx(100.0)
    # von Mises via the general 3-D formula with s3 = 0 (independent expression)
    rng = np.random.default_rng(2)
    a, b = rng.uniform(-300, 300, (2, 100))
    general = np.sqrt(((a - b) ** 2 + b**2 + a**2) / 2)
    np.testing.assert_allclose(von_mises(a, b), general, rtol=1e-12)
    with pytest.raises(ValueError):
        principal_stresses(1.0, 1.0, -5.0, 0.3)
    with pytest.raises(ValueError):
        principal_stresses(1.0, 1.0, 200e3, 0.5)


def test_rosette_to_von_mises_end_to_end():
    # Aluminium plate (E 70 GPa, nu 0.33, common practice) under a known stress state; strains
    # from the compliance relations, rectangular rosette rotated by 20 deg reads them.
    e_mpa, nu = 70_000.0, 0.33
    sx, sy, txy = 60.0, -25.0, 30.0
    ex = (sx - nu * sy) / e_mpa * 1e6
    ey = (sy - nu * sx) / e_mpa * 1e6
    gxy = 2 * (1 + nu) / e_mpa * txy * 1e6
    tensor = np.array([[[ex, gxy / 2], [gxy / 2, ey]]])
    angles = (20.0, 65.0, 110.0)
    r = readings_oracle(tensor, angles)
    e1, e2, _, _ = principal(*strain_tensor_from_gauges(r, angles))
    s1, s2 = principal_stresses(e1, e2, e_mpa, nu)
    # principal stresses of the stress tensor by numpy.linalg.eigh
    w = np.linalg.eigvalsh(np.array([[sx, txy], [txy, sy]]))
    assert s1[0] == pytest.approx(w[1], rel=1e-10)
    assert s2[0] == pytest.approx(w[0], rel=1e-10)
    assert von_mises(s1, s2)[0] == pytest.approx(math.sqrt(sx**2 - sx * sy + sy**2 + 3 * txy**2), rel=1e-10)
