"""Coefficients of the error-controlled steppers, with their published sources.

Three methods, each with an embedded lower-order solution for the local error
estimate and a continuous extension (dense output) for threshold crossings:

``bs32``
    Bogacki & Shampine (1989), "A 3(2) pair of Runge-Kutta formulas",
    Appl Math Lett 2:321-325. Four stages, first same as last (FSAL): the last
    stage is f at the new point. Its continuous extension is the cubic Hermite
    interpolant through both step ends (third order, C1 across steps).
``dp54``
    Dormand & Prince (1980), "A family of embedded Runge-Kutta formulae",
    J Comput Appl Math 6:19-26; fifth-order solution, fourth-order embedded.
    Seven stages, FSAL. Continuous extension of order four from Shampine (1986),
    "Some practical Runge-Kutta formulas", Math Comp 46:135-150, in the form of
    Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., section II.6 (the
    quartic below; its coefficients ``DP54_DENSE_D`` are those of the DOPRI5
    code).
``rodas3``
    Rodas3, Sandu, Verwer, Blom, Spee, Carmichael & Potra (1997),
    "Benchmarking stiff ODE solvers for atmospheric chemistry problems II:
    Rosenbrock solvers", Atmos Environ 31:3459-3472. Four stages, linearly
    implicit with the exact Jacobian, stiffly accurate (the embedded
    second-order solution is the last stage point, the error estimate the
    last stage), three right-hand-side evaluations per step. Published in the
    form solved in practice (Hairer & Wanner, Solving ODEs II, section IV.7,
    eq. (7.3)):

        (I / (h gamma) - J) u_i = f(y + sum_j a_ij u_j) + sum_j (c_ij / h) u_j,
        y1 = y + sum_i m_i u_i,   error = sum_i e_i u_i.

    The original (alpha, Gamma, b) form, in which the order conditions are
    stated, follows from ``Gamma^-1 = diag(1/gamma) - C``, ``alpha = a Gamma``,
    ``b = m Gamma``. Its dense output is the cubic Hermite interpolant (third
    order, matching the method); f at the new point is the next step's first
    stage anyway.

    Not ROS3P (Lang & Verwer 2001), the other candidate: its stage 2 has
    alpha_21 + gamma_21 = 0, so on a linear autonomous problem k2 = k1 and its
    embedded solution equals the propagated one. The error estimate then
    vanishes between events for every LIF cell, and the step grows without
    control (measured while writing this module: a LIF spike-time error of
    4e-5 ms at any tolerance).

Explicit tableaux: ``A`` (s, s) strictly lower triangular, ``B`` (s,) the
propagated weights, ``BHAT`` (s,) the embedded weights, ``C`` (s,) nodes, and
``E = B - BHAT`` (s,) the error weights (the local error estimate is
``h * sum_i E_i k_i``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# --------------------------------------------------------------------- bs32
BS32_C = np.array([0.0, 1.0 / 2.0, 3.0 / 4.0, 1.0])
BS32_A = np.array([
    [0.0, 0.0, 0.0, 0.0],
    [1.0 / 2.0, 0.0, 0.0, 0.0],
    [0.0, 3.0 / 4.0, 0.0, 0.0],
    [2.0 / 9.0, 1.0 / 3.0, 4.0 / 9.0, 0.0],
])
BS32_B = np.array([2.0 / 9.0, 1.0 / 3.0, 4.0 / 9.0, 0.0])
BS32_BHAT = np.array([7.0 / 24.0, 1.0 / 4.0, 1.0 / 3.0, 1.0 / 8.0])
BS32_E = BS32_B - BS32_BHAT

# --------------------------------------------------------------------- dp54
DP54_C = np.array([0.0, 1.0 / 5.0, 3.0 / 10.0, 4.0 / 5.0, 8.0 / 9.0, 1.0, 1.0])
DP54_A = np.array([
    [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
    [1.0 / 5.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
    [3.0 / 40.0, 9.0 / 40.0, 0.0, 0.0, 0.0, 0.0, 0.0],
    [44.0 / 45.0, -56.0 / 15.0, 32.0 / 9.0, 0.0, 0.0, 0.0, 0.0],
    [19372.0 / 6561.0, -25360.0 / 2187.0, 64448.0 / 6561.0, -212.0 / 729.0, 0.0, 0.0, 0.0],
    [9017.0 / 3168.0, -355.0 / 33.0, 46732.0 / 5247.0, 49.0 / 176.0, -5103.0 / 18656.0, 0.0, 0.0],
    [35.0 / 384.0, 0.0, 500.0 / 1113.0, 125.0 / 192.0, -2187.0 / 6784.0, 11.0 / 84.0, 0.0],
])
DP54_B = np.array([35.0 / 384.0, 0.0, 500.0 / 1113.0, 125.0 / 192.0, -2187.0 / 6784.0,
                   11.0 / 84.0, 0.0])
DP54_BHAT = np.array([5179.0 / 57600.0, 0.0, 7571.0 / 16695.0, 393.0 / 640.0,
                      -92097.0 / 339200.0, 187.0 / 2100.0, 1.0 / 40.0])
DP54_E = DP54_B - DP54_BHAT
# Quartic continuous extension (Hairer, Norsett & Wanner; Shampine 1986):
#   y(t0 + th h) = y0 + th (dy + (1 - th) (r3 + th (r4 + (1 - th) r5)))
#   dy = y1 - y0,  r3 = h k1 - dy,  r4 = dy - h k7 - r3,  r5 = h sum_i D_i k_i.
DP54_DENSE_D = np.array([-12715105075.0 / 11282082432.0, 0.0, 87487479700.0 / 32700410799.0,
                         -10690763975.0 / 1880347072.0, 701980252875.0 / 199316789632.0,
                         -1453857185.0 / 822651844.0, 69997945.0 / 29380423.0])

# ------------------------------------------------------------------- rodas3
RODAS3_GAMMA = 0.5
RODAS3_A_T = np.array([
    [0.0, 0.0, 0.0, 0.0],
    [0.0, 0.0, 0.0, 0.0],
    [2.0, 0.0, 0.0, 0.0],
    [2.0, 0.0, 1.0, 0.0],
])
RODAS3_C_T = np.array([
    [0.0, 0.0, 0.0, 0.0],
    [4.0, 0.0, 0.0, 0.0],
    [1.0, -1.0, 0.0, 0.0],
    [1.0, -1.0, -8.0 / 3.0, 0.0],
])
RODAS3_M = np.array([2.0, 0.0, 1.0, 1.0])
RODAS3_E_T = np.array([0.0, 0.0, 0.0, 1.0])


def rosenbrock_original(a_t: np.ndarray, c_t: np.ndarray, gamma: float, m: np.ndarray,
                        e: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Original-form coefficients of a Rosenbrock method given in the transformed form.

    Hairer & Wanner II, IV.7: with ``u = Gamma k``, ``C = diag(1/gamma) - Gamma^-1``,
    ``a = alpha Gamma^-1``, ``m = b Gamma^-1``.

    Returns
    -------
    alpha : ndarray (s, s)
    gamma_mat : ndarray (s, s)
        Lower triangular, diagonal ``gamma``.
    b, bhat : ndarray (s,)
        Propagated and embedded weights.
    """
    s = m.size
    gamma_mat = np.linalg.inv(np.eye(s) / gamma - c_t)
    return a_t @ gamma_mat, gamma_mat, m @ gamma_mat, (m - e) @ gamma_mat


# ---------------------------------------------------------------- registry
BS32 = 0
DP54 = 1
RODAS3 = 2
BDF = 3
"""Variable-order BDF: a multistep method, no tableau (:mod:`spikegauge.integrate.bdf`)."""
ADAPTIVE_STEPPER_CODES = {"bs32": BS32, "dp54": DP54, "rodas3": RODAS3, "bdf": BDF}


@dataclass(frozen=True)
class StepperInfo:
    """What the step-size controller needs to know about a stepper.

    Attributes
    ----------
    name : str
    order : int
        Order of the propagated solution (``bdf``: the order it starts, and
        restarts, at; it varies from 1 to 5).
    error_order : int
        Order of the embedded solution; the local error estimate is
        O(h^(error_order + 1)), which sets the controller's exponent.
    stages : int
        Right-hand-side evaluations per step (FSAL stage not counted twice).
    implicit : bool
        Uses the model Jacobian and linear solves.
    """

    name: str
    order: int
    error_order: int
    stages: int
    implicit: bool


STEPPER_INFO = {
    "bs32": StepperInfo("bs32", 3, 2, 3, False),
    "dp54": StepperInfo("dp54", 5, 4, 6, False),
    "rodas3": StepperInfo("rodas3", 3, 2, 3, True),
    "bdf": StepperInfo("bdf", 1, 1, 1, True),
}
