"""Coefficients, order conditions and measured orders of the error-controlled steppers.

Outside references: scipy.integrate's RK23/RK45 tableaux and dense-output
matrices (scipy.integrate._ivp.rk, from Bogacki & Shampine 1989, Dormand &
Prince 1980, Shampine 1986); Butcher's order conditions (Hairer, Norsett &
Wanner I, Table II.2.1); the Rosenbrock order conditions (Hairer & Wanner II,
Table IV.7.1); closed-form solutions; scipy.integrate.solve_ivp references.
"""
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.integrate._ivp.rk import RK23, RK45

from spikegauge.integrate import tableaux as tb
from spikegauge.integrate.adaptive_steppers import (N_ROWS, ROW_ERR, ROW_Y1, dense_coefficients,
                                                    finish_step, trial_step)
from spikegauge.models import MODELS
from spikegauge.models.kernels import rhs

from _adaptive_netutil import cell_rhs, hh_rest, model_params

EXPLICIT = {
    "bs32": (tb.BS32_A, tb.BS32_B, tb.BS32_BHAT, tb.BS32_C, 3, 2),
    "dp54": (tb.DP54_A, tb.DP54_B, tb.DP54_BHAT, tb.DP54_C, 5, 4),
}


def butcher_conditions(A, b, c):
    """(order, residual) of every order condition up to order 5 (Hairer, Norsett & Wanner I, II.2)."""
    Ac = A @ c
    Ac2 = A @ c**2
    AAc = A @ Ac
    return [
        (1, b.sum() - 1.0),
        (2, b @ c - 1 / 2),
        (3, b @ c**2 - 1 / 3), (3, b @ Ac - 1 / 6),
        (4, b @ c**3 - 1 / 4), (4, b @ (c * Ac) - 1 / 8), (4, b @ Ac2 - 1 / 12), (4, b @ AAc - 1 / 24),
        (5, b @ c**4 - 1 / 5), (5, b @ (c**2 * Ac) - 1 / 10), (5, b @ (c * Ac2) - 1 / 15),
        (5, b @ (c * AAc) - 1 / 30), (5, b @ Ac**2 - 1 / 20), (5, b @ (A @ c**3) - 1 / 20),
        (5, b @ (A @ (c * Ac)) - 1 / 40), (5, b @ (A @ Ac2) - 1 / 60), (5, b @ (A @ AAc) - 1 / 120),
    ]


def fitted_slope(h, err):
    return np.polyfit(np.log(h), np.log(err), 1)[0]


# ----------------------------------------------------------------- coefficients

@pytest.mark.parametrize("name", EXPLICIT)
def test_weights_sum_to_one_and_rows_of_a_sum_to_c(name):
    # consistency conditions of any Runge-Kutta tableau (common practice; scipy's rk tests check the same)
    A, b, bhat, c, _, _ = EXPLICIT[name]
    assert b.sum() == pytest.approx(1.0, abs=1e-15)
    assert bhat.sum() == pytest.approx(1.0, abs=1e-15)
    np.testing.assert_allclose(A.sum(axis=1), c, atol=1e-15)
    # first same as last: the last stage is f at the new point
    np.testing.assert_allclose(A[-1], b, atol=0)
    assert np.all(np.triu(A) == 0.0)


@pytest.mark.parametrize("name, ref", [("bs32", RK23), ("dp54", RK45)])
def test_tableaux_match_scipy(name, ref):
    # scipy.integrate's RK23 (Bogacki-Shampine) and RK45 (Dormand-Prince) tableaux
    A, b, bhat, c, _, _ = EXPLICIT[name]
    s = ref.n_stages
    np.testing.assert_allclose(A[:s, :ref.A.shape[1]], ref.A, rtol=1e-15, atol=1e-16)
    np.testing.assert_allclose(b[:s], ref.B, rtol=1e-15, atol=1e-16)
    np.testing.assert_allclose(c[:s], ref.C, rtol=1e-15)
    # scipy's E is (embedded - propagated); ours is (propagated - embedded)
    np.testing.assert_allclose(b - bhat, -ref.E, rtol=1e-13, atol=1e-17)


@pytest.mark.parametrize("name", EXPLICIT)
def test_order_conditions(name):
    # Butcher's conditions (Hairer, Norsett & Wanner I, Table II.2.1): the propagated weights
    # meet every condition up to their order, the embedded ones up to theirs and fail the next
    A, b, bhat, c, p, q = EXPLICIT[name]
    for order, res in butcher_conditions(A, b, c):
        if order <= p:
            assert abs(res) < 1e-14, (name, order)
    emb = butcher_conditions(A, bhat, c)
    assert all(abs(r) < 1e-14 for o, r in emb if o <= q)
    assert max(abs(r) for o, r in emb if o == q + 1) > 1e-4


RODAS3 = tb.rosenbrock_original(tb.RODAS3_A_T, tb.RODAS3_C_T, tb.RODAS3_GAMMA, tb.RODAS3_M,
                                 tb.RODAS3_E_T)


def test_rodas3_order_conditions():
    # Rosenbrock order conditions (Hairer & Wanner II, Table IV.7.1), beta = alpha + Gamma
    # off the diagonal, for the coefficients published by Sandu et al. 1997 in transformed form
    alpha, gmat, b, bhat = RODAS3
    g = tb.RODAS3_GAMMA
    np.testing.assert_allclose(np.diag(gmat), g, rtol=1e-15)
    beta = alpha + gmat - np.diag(np.diag(gmat))
    bp = beta.sum(axis=1)
    a = alpha.sum(axis=1)
    for w, order in ((b, 3), (bhat, 2)):
        assert w.sum() == pytest.approx(1.0, abs=1e-14)
        assert w @ bp == pytest.approx(0.5 - g, abs=1e-14)
        third = (w @ a**2 - 1 / 3, w @ (beta @ bp) - (1 / 6 - g + g * g))
        if order == 3:
            assert max(abs(x) for x in third) < 1e-14
        else:
            assert max(abs(x) for x in third) > 1e-3
    # stiffly accurate: the embedded solution is the last stage point (m - e = row 4 of a)
    np.testing.assert_allclose(tb.RODAS3_M[:3] - tb.RODAS3_E_T[:3], tb.RODAS3_A_T[3, :3], atol=0)


def test_rodas3_is_l_stable():
    # A-stable with R(inf) = 0 (stiffly accurate; Sandu et al. 1997, from memory):
    # R(z) = 1 + z b^T (I - z B)^-1 1 with B = alpha + Gamma (Hairer & Wanner II, IV.7)
    alpha, gmat, b, _ = RODAS3
    B = alpha + gmat
    one = np.ones(b.size)

    def R(z):
        return 1 + z * b @ np.linalg.solve(np.eye(b.size) - z * B, one)

    for y in np.concatenate([-np.logspace(-3, 5, 400), np.logspace(-3, 5, 400)]):
        assert abs(R(1j * y)) <= 1 + 1e-12
    assert abs(R(-1e9)) < 1e-6
    # the only pole, 1/gamma, lies in the right half-plane
    assert np.all(np.linalg.eigvals(B).real > 0)


@pytest.mark.parametrize("name, ref", [("bs32", RK23), ("dp54", RK45)])
def test_dense_output_matches_scipy(name, ref):
    # scipy's dense-output matrices P (RK23: Hermite; RK45: Shampine 1986) against our polynomial
    rng = np.random.default_rng(3)
    code = tb.ADAPTIVE_STEPPER_CODES[name]
    s = ref.n_stages + 1
    K = np.zeros((N_ROWS, 1))
    K[:s, 0] = rng.normal(size=s)
    h = 0.37
    y0 = np.array([0.8])
    _, b, _, _, _, _ = EXPLICIT[name]
    K[ROW_Y1, 0] = y0[0] + h * (b[:s] @ K[:s, 0])
    coef = np.empty(5)
    dense_coefficients(code, y0, K, h, 0, coef)
    for th in (0.0, 0.1, 0.5, 0.77, 1.0):
        powers = th ** np.arange(1, ref.P.shape[1] + 1)
        expect = y0[0] + h * (K[:s, 0] @ (ref.P @ powers))
        got = np.polyval(coef[::-1], th)
        assert got == pytest.approx(expect, rel=1e-13, abs=1e-14)


# ------------------------------------------------- measured orders, closed form

def logistic(t):
    """y' = y (1 - y), y(0) = 0.1: y = 1 / (1 + 9 e^-t) (closed form)."""
    return 1.0 / (1.0 + 9.0 * np.exp(-t))


def _numpy_rk(A, b, h, n):
    y = 0.1
    f = lambda v: v * (1 - v)  # noqa: E731
    for _ in range(n):
        k = np.zeros(b.size)
        for i in range(b.size):
            k[i] = f(y + h * (A[i, :i] @ k[:i]))
        y = y + h * (b @ k)
    return y


def _numpy_rodas3(m, h, n):
    y = 0.1
    f = lambda v: v * (1 - v)  # noqa: E731
    s = m.size
    for _ in range(n):
        J = 1 - 2 * y
        u = np.zeros(s)
        for i in range(s):
            yi = y + tb.RODAS3_A_T[i, :i] @ u[:i]
            u[i] = (f(yi) + (tb.RODAS3_C_T[i, :i] @ u[:i]) / h) / (1 / (h * tb.RODAS3_GAMMA) - J)
        y = y + m @ u
    return y


@pytest.mark.parametrize("name, weights, order", [
    ("bs32", "b", 3), ("bs32", "bhat", 2), ("dp54", "b", 5), ("dp54", "bhat", 4),
    ("rodas3", "b", 3), ("rodas3", "bhat", 2)])
def test_measured_order_on_logistic_equation(name, weights, order):
    # global error at t = 2 against the closed form, fitted log-log slope
    T = 2.0
    ns = np.array([10, 20, 40, 80]) if order >= 4 else np.array([20, 40, 80, 160])
    errs = []
    for n in ns:
        if name == "rodas3":
            y = _numpy_rodas3(tb.RODAS3_M if weights == "b" else tb.RODAS3_M - tb.RODAS3_E_T, T / n, n)
        else:
            A, b, bhat, _, _, _ = EXPLICIT[name]
            y = _numpy_rk(A, b if weights == "b" else bhat, T / n, n)
        errs.append(abs(y - logistic(T)))
    assert fitted_slope(T / ns, np.array(errs)) == pytest.approx(order, abs=0.25)


# ---------------------------------------- the compiled steps on a nonlinear cell

HH = MODELS["hh-squid"]
HH_P = np.ascontiguousarray(model_params("hh-squid", 1, i_bias_ua_per_cm2=10.0)[0])


@pytest.fixture(scope="module")
def hh_reference():
    # solve_ivp DOP853 at rtol = atol = 1e-13 through the package's rhs: a dense reference
    # through the first spike (t = 0..5.2 ms)
    sol = solve_ivp(cell_rhs("hh-squid", HH_P), (0.0, 5.2), hh_rest(), method="DOP853",
                    rtol=1e-13, atol=1e-13, dense_output=True)
    assert sol.success
    return sol.sol


def _steps(method, y0, h, n):
    y = y0.copy()
    w = y.size
    K = np.zeros((N_ROWS, w))
    M = np.zeros((w, w))
    J = np.zeros((w, w))
    piv = np.zeros(w, dtype=np.int64)
    for _ in range(n):
        rhs(HH.code, y, HH_P, False, K[0])
        nf, _ = trial_step(method, HH.code, y, HH_P, False, h, w, K, M, piv, J)
        assert nf > 0
        finish_step(method, HH.code, HH_P, False, w, K)
        y = K[ROW_Y1].copy()
    return y, K


@pytest.mark.parametrize("name, order", [("bs32", 3), ("dp54", 5), ("rodas3", 3)])
def test_compiled_step_global_order_on_hh(name, order, hh_reference):
    # fixed-step global error (in units of each state's scale) against solve_ivp: at 1.6 ms
    # (V rising into the first spike) for the third-order steppers; over the whole first
    # spike (5 ms) for dp54, whose error at 1.6 ms reaches the reference's accuracy too soon
    method = tb.ADAPTIVE_STEPPER_CODES[name]
    if order == 5:
        T, ns = 5.0, np.array([100, 200, 400, 800])
    else:
        T, ns = 1.6, np.array([32, 64, 128, 256])
    errs = [np.max(np.abs(_steps(method, hh_rest(), T / n, n)[0] - hh_reference(T)) / HH.scale)
            for n in ns]
    assert fitted_slope(T / ns, np.array(errs)) == pytest.approx(order, abs=0.5)


@pytest.mark.parametrize("name, est_order, dense_order", [("bs32", 3, 4), ("dp54", 5, 5),
                                                          ("rodas3", 3, 4)])
def test_error_estimate_and_dense_output_orders_on_hh(name, est_order, dense_order, hh_reference):
    # one step from the reference state at t = 1.5 ms: the embedded error estimate is
    # O(h^(q+1)); the dense output's local error at mid-step is O(h^(p*+1)) with p* its order
    # (3 for the Hermite cubic, 4 for Shampine's quartic)
    method = tb.ADAPTIVE_STEPPER_CODES[name]
    t0 = 1.5
    y0 = hh_reference(t0)
    hs = np.array([0.08, 0.04, 0.02, 0.01]) if name == "dp54" else np.array([0.02, 0.01, 0.005, 0.0025])
    est, dense = [], []
    for h in hs:
        _, K = _steps(method, y0, h, 1)
        est.append(np.max(np.abs(K[ROW_ERR]) / HH.scale))
        coef = np.empty(5)
        mid = hh_reference(t0 + 0.5 * h)
        e = 0.0
        for q in range(y0.size):
            dense_coefficients(method, y0, K, h, q, coef)
            e = max(e, abs(np.polyval(coef[::-1], 0.5) - mid[q]) / HH.scale[q])
        dense.append(e)
    assert fitted_slope(hs, np.array(est)) == pytest.approx(est_order, abs=0.35)
    assert fitted_slope(hs, np.array(dense)) == pytest.approx(dense_order, abs=0.4)
    assert math.isfinite(est[-1])
