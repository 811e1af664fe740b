"""Single-cell numba kernels of every model, dispatched on the model code.

Signatures (one cell; ``y``, ``p``, ``dydt``, ``a``, ``b`` 1-D float64 arrays
that may be longer than the model's own counts, ``J`` 2-D float64 at least
``(n_states, n_states)``; only the model's own entries are read or written)::

    rhs(code, y, p, clamped, dydt)    dydt = f(y)
    jac(code, y, p, clamped, J)       J[:n, :n] = d f / d y (structural zeros written too)
    split(code, y, p, clamped, a, b)  f_i = a_i + b_i y_i (the exponential-Euler split)
    reset(code, y, p)                 the model's reset at a spike (none for HH models)

The split: for every state but V, b_i = d f_i / d y_i (gates: a = phi alpha,
b = -phi (alpha + beta), the Rush-Larsen form; synapses a = 0, b = -1/tau;
AdEx w: a = a (V - E_L)/tau_w, b = -1/tau_w). For V, b = -(total membrane
conductance)/C with the gates frozen and a = the rest of f_V. That equals
d f_V / dV for the LIF models and hh-squid; for adex it leaves the
exponential spike current in a, for hh-interneuron the slope of m_inf(V),
since with those slopes in b an exponential step blows up on the upswing
(see the models' ``split`` docstrings).

``clamped`` (bool) is the refractory clamp: dV/dt = 0, row 0 of J is zero,
a_0 = b_0 = 0; every other state keeps evolving. Codes: 0 lif-current,
1 lif-conductance, 2 adex, 3 hh-squid, 4 hh-interneuron; codes from 5 on
are model files, whose kernels are called through
:mod:`spikegauge.models.generated` (codes are validated in Python, once).

A plain if/elif keeps one compiled specialisation for every model, which is
what lets a sweep compile once per strategy rather than once per model; the
branch is on a per-cell constant and costs nothing next to a right-hand side.
"""
from __future__ import annotations

import numpy as np

from .._numba import jit
from . import adex, generated, hh_interneuron, hh_squid, lif_conductance, lif_current


@jit
def rhs(code, y, p, clamped, dydt):
    """Right-hand side f(y) of one cell of model ``code`` into ``dydt``."""
    if code == 0:
        lif_current.rhs(y, p, clamped, dydt)
    elif code == 1:
        lif_conductance.rhs(y, p, clamped, dydt)
    elif code == 2:
        adex.rhs(y, p, clamped, dydt)
    elif code == 3:
        hh_squid.rhs(y, p, clamped, dydt)
    elif code == 4:
        hh_interneuron.rhs(y, p, clamped, dydt)
    elif code >= generated.FIRST_CODE:
        generated.rhs(code, y, p, clamped, dydt)


@jit
def jac(code, y, p, clamped, J):
    """Jacobian d f / d y of one cell of model ``code`` into ``J[:n, :n]``."""
    if code == 0:
        lif_current.jac(y, p, clamped, J)
    elif code == 1:
        lif_conductance.jac(y, p, clamped, J)
    elif code == 2:
        adex.jac(y, p, clamped, J)
    elif code == 3:
        hh_squid.jac(y, p, clamped, J)
    elif code == 4:
        hh_interneuron.jac(y, p, clamped, J)
    elif code >= generated.FIRST_CODE:
        generated.jac(code, y, p, clamped, J)


@jit
def split(code, y, p, clamped, a, b):
    """Quasi-linear split f_i = a_i + b_i y_i of one cell into ``a``, ``b`` (see module docstring)."""
    if code == 0:
        lif_current.split(y, p, clamped, a, b)
    elif code == 1:
        lif_conductance.split(y, p, clamped, a, b)
    elif code == 2:
        adex.split(y, p, clamped, a, b)
    elif code == 3:
        hh_squid.split(y, p, clamped, a, b)
    elif code == 4:
        hh_interneuron.split(y, p, clamped, a, b)
    elif code >= generated.FIRST_CODE:
        generated.split(code, y, p, clamped, a, b)


@jit
def reset(code, y, p):
    """Apply the spike reset of model ``code`` to ``y`` in place."""
    if code == 0:
        lif_current.reset(y, p)
    elif code == 1:
        lif_conductance.reset(y, p)
    elif code == 2:
        adex.reset(y, p)
    elif code == 3:
        hh_squid.reset(y, p)
    elif code == 4:
        hh_interneuron.reset(y, p)
    elif code >= generated.FIRST_CODE:
        generated.reset(code, y, p)


N_DERIVED = 1
"""Rows of the derived-constant array ``D`` of :func:`rhs_cols` (hh-squid's phi)."""


@jit
def derive_cols(code, P, lo, hi, D):
    """Fill ``D[:, lo:hi]`` with the per-cell constants :func:`rhs_cols` reads (model ``code``)."""
    if code == 3:
        hh_squid.derive_cols(P, lo, hi, D)


@jit
def rhs_cols(code, Y, P, D, lo, hi, n_states, clamped, F, k):
    """Right-hand side of cells lo..hi-1, all of model ``code``, in structure-of-arrays form.

    ``Y`` is (>= n_states, >= hi - lo) with column ``i - lo`` for cell ``i``;
    the derivatives go to ``F[k, :n_states, :hi - lo]``; ``P`` (n_params,
    n_cells) and ``D`` (N_DERIVED, n_cells) are indexed by ``i``;
    ``clamped[i - lo]`` is the clamp flag. Models with a column form run it as
    loops that LLVM vectorises (same formulas as :func:`rhs`; hh-squid's and
    the model files' exponentials may differ from it in the last bit); the
    others go cell by cell through :func:`rhs`.
    """
    if code == 0:
        lif_current.rhs_cols(Y, P, lo, hi, clamped, F, k)
    elif code == 1:
        lif_conductance.rhs_cols(Y, P, lo, hi, clamped, F, k)
    elif code == 3:
        hh_squid.rhs_cols(Y, P, D, lo, hi, clamped, F, k)
    elif code >= generated.FIRST_CODE and generated.rhs_cols(code, Y, P, lo, hi, clamped, F, k):
        pass  # a model file's generated column loop
    else:
        y = np.zeros(Y.shape[0])
        p = np.empty(P.shape[0])
        f = np.zeros(Y.shape[0])
        for j in range(hi - lo):
            for s in range(n_states):
                y[s] = Y[s, j]
            for s in range(P.shape[0]):
                p[s] = P[s, lo + j]
            rhs(code, y, p, clamped[j], f)
            for s in range(n_states):
                F[k, s, j] = f[s]
