"""The point-neuron models: registry, tables for kernels, resting states.

Every model is a :class:`~spikegauge.models.base.ModelSpec` (names, units,
defaults, scales, bounds) plus single-cell numba kernels in
:mod:`spikegauge.models.kernels`, dispatched on ``spec.code``:

====  ===================  ==========================================
code  name                 module
====  ===================  ==========================================
0     ``lif-current``      :mod:`~spikegauge.models.lif_current`
1     ``lif-conductance``  :mod:`~spikegauge.models.lif_conductance`
2     ``adex``             :mod:`~spikegauge.models.adex`
3     ``hh-squid``         :mod:`~spikegauge.models.hh_squid`
4     ``hh-interneuron``   :mod:`~spikegauge.models.hh_interneuron`
5...  model files          :mod:`~spikegauge.models.codegen`
====  ===================  ==========================================

Model files (:mod:`~spikegauge.models.model_file`) join the registry when a
scenario or a command loads them (:func:`load_model_file`,
:func:`model_from_text`): codes from 5 on, in the order this process loads
them.

The table functions return arrays indexed by model code, padded past each
model's own states so that drivers can index them with ``cell_model``.

Keys of ``spec.extra`` (for scenario validation and initial values):

``rest_guess_slot``
    parameter slot of the leak reversal, where :func:`rest_state` starts.
``positive_params``
    parameter keys that must be > 0 (the kernels divide by them).
``nonnegative_params``
    parameter keys that must be >= 0.
``fixed_params``
    parameter keys a scenario may not set (Hodgkin-Huxley models have no
    reset and no refractory clamp: ``v_reset_mv`` stays NaN, ``t_ref_ms`` 0).
"""
from __future__ import annotations

import numpy as np
import scipy.optimize

import hashlib
import threading
from pathlib import Path

from .._numba import jit
from ..errors import ComputationError, InputError
from . import adex, hh_interneuron, hh_squid, lif_conductance, lif_current
from .base import ModelSpec
from .generated import FIRST_CODE, MAX_MODEL_FILES
from .kernels import jac, rhs, split

_BY_CODE: list[ModelSpec] = [
    lif_current.SPEC,
    lif_conductance.SPEC,
    adex.SPEC,
    hh_squid.SPEC,
    hh_interneuron.SPEC,
]
assert len(_BY_CODE) == FIRST_CODE

BUILT_IN: tuple[str, ...] = tuple(spec.name for spec in _BY_CODE)
"""Names of the built-in models."""

MODELS: dict[str, ModelSpec] = {spec.name: spec for spec in _BY_CODE}
"""Every model by its scenario name: the built-in ones and the model files loaded so far."""

_BY_DIGEST: dict[str, ModelSpec] = {}
_REGISTRY_LOCK = threading.Lock()


def model_from_text(text: str, label: str) -> ModelSpec:
    """The model of a model file's text, compiled (or loaded from the cache) once per process.

    ``label`` names the file in error messages. Raises InputError for a bad
    file (before any compilation) or a name taken by a built-in model.
    """
    from .codegen import compile_model
    from .model_file import read_model_text

    digest = hashlib.sha256(text.encode()).hexdigest()
    with _REGISTRY_LOCK:  # threads of one worker may load the same file at once
        known = _BY_DIGEST.get(digest)
        if known is not None:
            return known
        definition = read_model_text(text, label)
        if definition.name in BUILT_IN:
            raise InputError(f"{label}: model.name: {definition.name!r} is a built-in model; choose another name")
        slot = len(_BY_CODE) - FIRST_CODE
        if slot >= MAX_MODEL_FILES:
            raise InputError(f"{label}: this process has loaded {MAX_MODEL_FILES} model files, the most it can hold")
        spec = compile_model(definition, slot)
        _BY_CODE.append(spec)
        _BY_DIGEST[digest] = spec
        MODELS[spec.name] = spec
        return spec


def load_model_file(path) -> ModelSpec:
    """The model of the model file at ``path`` (see :func:`model_from_text`)."""
    path = Path(path)
    try:
        text = path.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the model file ({exc.__class__.__name__}: {exc})") from None
    return model_from_text(text, str(path))


def get_model(name: str) -> ModelSpec:
    """Return the model called ``name``.

    Raises
    ------
    InputError
        If no model has that name; the message lists the known models.
    """
    try:
        return MODELS[name]
    except (KeyError, TypeError):
        known = ", ".join(MODELS)
        raise InputError(f"unknown model {name!r}; known models: {known}") from None


def model_by_code(code: int) -> ModelSpec:
    """Return the model with integer code ``code`` (0 <= code < len(MODELS))."""
    if not 0 <= int(code) < len(_BY_CODE):
        raise ValueError(f"no model has code {code}; codes run from 0 to {len(_BY_CODE) - 1}")
    return _BY_CODE[int(code)]


def max_states() -> int:
    """Largest number of states of any model (the padded state width)."""
    return max(spec.n_states for spec in _BY_CODE)


def max_params() -> int:
    """Largest number of parameters of any model (the padded parameter width)."""
    return max(spec.n_params for spec in _BY_CODE)


def _padded(attr: str, fill, dtype) -> np.ndarray:
    out = np.full((len(_BY_CODE), max_states()), fill, dtype=dtype)
    for spec in _BY_CODE:
        out[spec.code, :spec.n_states] = getattr(spec, attr)
    return out


def state_bounds() -> tuple[np.ndarray, np.ndarray]:
    """Divergence bounds of every model's states.

    Returns
    -------
    lower, upper : ndarray of float64, shape (n_models, max_states)
        A state outside [lower, upper] (or non-finite) means the run diverged.
        Padding past a model's own states is -inf / +inf.
    """
    return _padded("lower", -np.inf, np.float64), _padded("upper", np.inf, np.float64)


def state_scales() -> np.ndarray:
    """Typical magnitude of every model's states, shape (n_models, max_states); padding 1.0."""
    return _padded("scale", 1.0, np.float64)


def physical_zero() -> np.ndarray:
    """Where the relative tolerance applies, bool shape (n_models, max_states); padding False."""
    return _padded("has_physical_zero", False, np.bool_)


def n_states_table() -> np.ndarray:
    """Number of states of each model, int64 shape (n_models,)."""
    return np.array([spec.n_states for spec in _BY_CODE], dtype=np.int64)


def receptor_state_table() -> np.ndarray:
    """State index incremented by each receptor, int64 shape (n_models, 2).

    Column RECEPTOR_EXC (0) holds ``exc_state``, column RECEPTOR_INH (1)
    ``inh_state``. RECEPTOR_CURRENT events change ``p[P_IEXT]`` instead.
    """
    return np.array([[spec.exc_state, spec.inh_state] for spec in _BY_CODE], dtype=np.int64)


def steady_state_at(spec: ModelSpec, params, v_mv) -> np.ndarray:
    """States of cells held at voltage V: every other state at its steady value.

    Gates at x_inf(V), synaptic states 0, AdEx w = a (V - E_L): each state
    i >= 1 solves a_i + b_i y_i = 0 of the quasi-linear split at that V (for
    every model those states depend on V only, never on each other).

    Parameters
    ----------
    spec : ModelSpec
    params : array_like of float, shape (n_cells, >= spec.n_params)
    v_mv : array_like of float, shape (n_cells,)

    Returns
    -------
    ndarray of float64, shape (n_cells, spec.n_states)
    """
    p_all = np.ascontiguousarray(params, dtype=np.float64)
    v_all = np.asarray(v_mv, dtype=np.float64)
    if p_all.ndim != 2 or p_all.shape[1] < spec.n_params or v_all.shape != (p_all.shape[0],):
        raise ValueError(f"{spec.name}: need params (n_cells, >= {spec.n_params}) and v_mv (n_cells,)")
    out = np.zeros((v_all.size, spec.n_states))
    _steady_rows(spec.code, p_all, v_all, out)
    return out


@jit
def _steady_rows(code, p_all, v_all, out):
    """Kernel of :func:`steady_state_at`: one split per cell, out filled in place."""
    n = out.shape[1]
    a = np.empty(n)
    b = np.empty(n)
    for c in range(v_all.size):
        out[c, 0] = v_all[c]
        split(code, out[c], p_all[c], False, a, b)
        for i in range(1, n):
            out[c, i] = -a[i] / b[i]


def rest_state(spec: ModelSpec, params) -> np.ndarray:
    """Fixed point of one cell with these parameters and no synaptic input.

    The external current ``params[P_IEXT]`` is included as given: pass 0 there
    for the true resting state. With a current past the loss of stability of
    rest (e.g. above 9.775 uA/cm2 for hh-squid, CHECKS.md) the fixed point
    returned is unstable. Starts from V = E_L with every other state at its
    steady value for that V (:func:`steady_state_at`), then
    solves f(y) = 0 with :func:`scipy.optimize.root` (hybrid Powell, with the
    model's Jacobian). For AdEx this start lies below the unstable fixed point
    near V_T, so the stable rest is found when it exists.

    Parameters
    ----------
    spec : ModelSpec
    params : array_like of float, shape (>= spec.n_params,)

    Returns
    -------
    ndarray of float64, shape (spec.n_states,)

    Raises
    ------
    ComputationError
        If the solver does not reach a fixed point inside the model's bounds
        (for example an AdEx current so large that no fixed point exists).
    """
    p = np.ascontiguousarray(params, dtype=np.float64)
    if p.ndim != 1 or p.size < spec.n_params:
        raise ValueError(f"{spec.name} needs a parameter vector of at least {spec.n_params} values")
    n = spec.n_states
    if "initial" in spec.extra:  # a model file: start from its own initial values
        y0 = spec.extra["initial"](p[None, :], {})[0]
    else:
        y0 = steady_state_at(spec, p[None, :], np.array([p[spec.extra["rest_guess_slot"]]]))[0]

    def fun(y):
        out = np.empty(n)
        rhs(spec.code, np.ascontiguousarray(y), p, False, out)
        return out

    def fjac(y):
        out = np.empty((n, n))
        jac(spec.code, np.ascontiguousarray(y), p, False, out)
        return out

    sol = scipy.optimize.root(fun, y0, jac=fjac, method="hybr", tol=1e-13)
    # Residual in units of each state's typical magnitude per ms.
    resid = np.max(np.abs(fun(sol.x)) / spec.scale) if np.all(np.isfinite(sol.x)) else np.inf
    # Out of bounds is no answer either: with the AdEx exponent capped, a
    # suprathreshold current has a spurious fixed point near 1e22 mV.
    inside = np.all((sol.x >= spec.lower) & (sol.x <= spec.upper))
    if not (resid < 1e-9 and inside):
        raise ComputationError(
            f"no resting state found for {spec.name} with these parameters "
            f"(scaled residual {resid:.3g}: {sol.message})"
        )
    return sol.x
