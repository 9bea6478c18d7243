"""Bridge transducer conversion: rated output and certificate polynomials."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from straind.transducer import Certificate, fit_certificate, value_from_rated


def test_rated_output_worked_example():
    # OIML R60 (rated output: output at capacity per volt of excitation): a 2 mV/V, 10 kN cell
    # reading 1 mV/V carries 5 kN; reading -0.5 mV/V (reverse load) -2.5 kN.
    got = value_from_rated(np.array([1e-3, -0.5e-3, 0.0, 2e-3]), 2.0, 10.0)
    np.testing.assert_allclose(got, [5.0, -2.5, 0.0, 10.0], rtol=1e-15, atol=0)
    assert value_from_rated(1.5e-3, 3.0, 500.0) == pytest.approx(250.0, rel=1e-15)
    assert value_from_rated(np.zeros((4, 2)), 2.0, 10.0).shape == (4, 2)


@pytest.mark.parametrize("s,cap,match", [
    (0.0, 10.0, "rated_output_mv_per_v"), (float("nan"), 10.0, "rated_output_mv_per_v"),
    ("2", 10.0, "rated_output_mv_per_v"), (2.0, 0.0, "capacity"), (2.0, float("inf"), "capacity"),
])
def test_rated_output_rejects_bad_input(s, cap, match):
    with pytest.raises(ValueError, match=match):
        value_from_rated(1e-3, s, cap)


def _cubic(u):
    # A known cubic: value = 0.5 + 4000 u - 25 u^2 + 3 u^3 (kN, u in mV/V).
    return 0.5 + 4000.0 * u - 25.0 * u ** 2 + 3.0 * u ** 3


def test_fit_recovers_known_cubic_from_exact_points():
    # Oracle: the polynomial the points were generated from (exact data -> zero residuals).
    u = np.linspace(0.0, 2.0, 11)
    cert = fit_certificate(u, _cubic(u), 3)
    assert cert.degree == 3
    np.testing.assert_allclose(cert.coefficients, [0.5, 4000.0, -25.0, 3.0], rtol=1e-9, atol=1e-9)
    assert cert.max_abs_residual < 1e-9
    assert cert.max_abs_residual == max(abs(r) for r in cert.residuals)
    assert len(cert.residuals) == 11 and cert.points_mv_per_v == tuple(u)
    # evaluate takes V/V; values between the certificate points follow the cubic
    v_per_v = np.array([0.15e-3, 0.77e-3, 1.93e-3])
    np.testing.assert_allclose(cert.evaluate(v_per_v), _cubic(v_per_v * 1000.0), rtol=1e-12)
    np.testing.assert_allclose(cert.evaluate_mv_per_v(1.25), _cubic(1.25), rtol=1e-12)


def test_fit_exactly_determined_cases():
    # degree + 1 distinct points: the polynomial passes through every point.
    u = np.array([0.0, 1.0])
    cert = fit_certificate(u, [0.0, 5000.0], 1)
    np.testing.assert_allclose(cert.coefficients, [0.0, 5000.0], atol=1e-9)
    u = np.array([0.2, 1.1, 2.0])
    y = 1.0 + 2.0 * u + 0.3 * u ** 2
    cert = fit_certificate(u, y, 2)
    np.testing.assert_allclose(cert.coefficients, [1.0, 2.0, 0.3], rtol=1e-10)
    assert cert.max_abs_residual < 1e-12


@pytest.mark.parametrize("degree", [1, 2, 3])
def test_noisy_fit_against_independent_normal_equations(degree):
    # Oracle: least squares solved independently by the normal equations (V^T V) c = V^T y,
    # and the defining property that the residual is orthogonal to every column of V.
    rng = np.random.default_rng(11 + degree)
    u = np.repeat(np.linspace(-2.0, 2.0, 9), 2)          # ascending and descending runs
    y = _cubic(u) + rng.normal(0.0, 0.8, size=u.size)
    cert = fit_certificate(u, y, degree)
    vander = np.column_stack([u ** p for p in range(degree + 1)])
    c_ne = np.linalg.solve(vander.T @ vander, vander.T @ y)
    np.testing.assert_allclose(cert.coefficients, c_ne, rtol=1e-8, atol=1e-8)
    resid_ne = y - vander @ c_ne
    np.testing.assert_allclose(cert.residuals, resid_ne, rtol=0, atol=1e-8)
    np.testing.assert_allclose(vander.T @ np.array(cert.residuals), 0.0, atol=1e-7)
    assert cert.max_abs_residual == pytest.approx(np.max(np.abs(resid_ne)), abs=1e-8)


def test_evaluate_is_vectorised_over_blocks():
    u = np.linspace(0.0, 2.0, 6)
    cert = fit_certificate(u, _cubic(u), 3)
    ratio = np.linspace(0, 2e-3, 40).reshape(10, 4)
    out = cert.evaluate(ratio)
    assert out.shape == (10, 4)
    np.testing.assert_allclose(out, _cubic(ratio * 1000.0), rtol=1e-12, atol=1e-9)


def test_certificate_is_immutable():
    cert = fit_certificate([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], 1)
    assert isinstance(cert, Certificate)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cert.degree = 2  # type: ignore[misc]


# ISO 376 allows calibration equations of degree 1 to 3 for force-proving instruments.
@pytest.mark.parametrize("points,values,degree,match", [
    ([0, 1, 2, 3, 4], [0, 1, 2, 3, 4], 0, "degree"),
    ([0, 1, 2, 3, 4], [0, 1, 2, 3, 4], 4, "degree"),
    ([0, 1, 2, 3, 4], [0, 1, 2, 3, 4], 1.5, "degree"),
    ([0, 1, 2, 3, 4], [0, 1, 2, 3, 4], True, "degree"),
    ([0, 1, 2], [0, 1, 2], 3, "at least 4 distinct points"),
    ([0, 1, 1, 2, 2], [0, 1, 1, 2, 2], 3, "at least 4 distinct points, got 3"),
    ([0.5], [1.0], 1, "at least 2 distinct points"),
    ([0, 1, 2], [0, 1], 1, "pair up"),
    ([0, 1, float("nan")], [0, 1, 2], 1, "finite"),
    ([0, 1, 2], [0, float("inf"), 2], 1, "finite"),
])
def test_fit_rejects_bad_input(points, values, degree, match):
    with pytest.raises(ValueError, match=match):
        fit_certificate(points, values, degree)
