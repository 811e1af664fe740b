"""From a checked model file to compiled kernels and a :class:`ModelSpec`.

:func:`compile_model` differentiates the right-hand side with sympy (the
Jacobian for implicit steppers, its diagonal for the exponential-Euler split
f_i = a_i + b_i y_i with b_i = d f_i / d y_i), writes the five kernels of
:mod:`spikegauge.models.generated` as Python source into the kernel cache
folder (file name from a hash of the model text and of this generator), and
compiles them as numba ``cfunc``\\ s cached on disk, so a second run of the
same model file loads them instead of compiling. The spec it returns carries
the per-cell parameter derivation (threshold, refractory period) and the
initial values as numpy functions of the parameters.

Layout of a model file's cell (the contract of :mod:`spikegauge.models.base`):
state 0 is the spike state, the others follow in the file's order; parameter
slot ``P_IEXT`` is the file's current parameter, ``P_VTH`` and ``P_TREF``
hold the threshold and refractory period evaluated per cell, ``P_VRESET`` is
0 when the model resets and NaN when it does not (the integrators read it as
that flag only), and the file's other parameters follow in its order.
"""
from __future__ import annotations

import hashlib
import importlib.util
import math
import os
import sys
import tempfile
from pathlib import Path

import numba
import numpy as np
import sympy
from sympy.printing.pycode import PythonCodePrinter

from ..errors import InputError
from .base import N_COMMON_PARAMS, P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo
from .generated import FIRST_CODE, install
from .model_file import ModelDefinition

GENERATOR_VERSION = "6"
"""Part of the generated file's name: bump when the generated code changes form."""

DERIVED_KEYS = ("spike.threshold", "spike.reset", "spike.refractory")
"""Keys of the parameter slots P_VTH, P_VRESET, P_TREF of a model file (derived, not set by scenarios)."""

PLACEHOLDER_SCALE = 1.0
"""Scale of a state the file gives none for, until a pilot run measures it."""


class _Printer(PythonCodePrinter):
    """Python source that numba compiles: math functions, our helpers for the rest."""

    def _print_safe_ratio(self, e):
        return f"safe_ratio({self._print(e.args[0])})"

    def _print_safe_ratio_slope(self, e):
        return f"safe_ratio_slope({self._print(e.args[0])})"

    def _print_Heaviside(self, e):
        return f"step({self._print(e.args[0])})"

    def _print_sign(self, e):
        return f"sign({self._print(e.args[0])})"

    def _print_Pow(self, e, rational=False):
        # small whole powers as products (m**3 h in Hodgkin-Huxley currents): no pow call,
        # and a loop over cells that computes them stays vectorisable
        base, expo = e.args
        if expo.is_Integer and 2 <= int(expo) <= 8:
            b = self._print(base) if base.is_Symbol else f"({self._print(base)})"
            return "(" + "*".join([b] * int(expo)) + ")"
        return super()._print_Pow(e, rational=rational)


class _VectorPrinter(_Printer):
    """As :class:`_Printer`, with the exponential LLVM vectorises (:mod:`spikegauge.models.fastexp`)."""

    def _print_exp(self, e):
        return f"vector_exp({self._print(e.args[0])})"

    def _print_safe_ratio(self, e):
        return f"safe_ratio_vector({self._print(e.args[0])})"


def _local(name: str) -> str:
    return f"m_{name}"


def _ordered_states(model: ModelDefinition) -> list:
    return [model.spike_state] + [s.name for s in model.states if s.name != model.spike_state]


def _ordered_params(model: ModelDefinition) -> list:
    return [model.current] + [p.name for p in model.parameters if p.name != model.current]


def _hoisted(model: ModelDefinition) -> tuple[dict, list]:
    """Derivatives with their costly parameter-only parts taken out, and those parts.

    A subexpression of the parameters alone that calls a function or takes a
    power (a temperature factor 3**((T - 6.3)/10), say) is the same at every
    step: it becomes a hidden parameter ``hidden.k``, computed per cell when the
    network is built. The current parameter is never part of one (drives change it).

    Returns ({state: expression}, [(hidden name, expression)]).
    """
    fixed = {model.symbols[p.name] for p in model.parameters if p.name != model.current}
    table: dict = {}

    def costly(e):
        return any(isinstance(x, (sympy.Function, sympy.Pow)) for x in sympy.preorder_traversal(e))

    def visit(e):
        if e.is_Atom:
            return e
        if e.free_symbols <= fixed and costly(e):
            if e not in table:
                table[e] = sympy.Symbol(f"hidden.{len(table)}", real=True)
            return table[e]
        return e.func(*[visit(a) for a in e.args])

    derivatives = {s: visit(e) for s, e in model.derivatives.items()}
    return derivatives, [(symbol.name, e) for e, symbol in table.items()]


def _param_slot(model: ModelDefinition, hidden: list) -> dict:
    """Parameter name (and hidden parameter name, ``hidden`` from :func:`_hoisted`) -> slot."""
    names = _ordered_params(model)
    slots = {names[0]: P_IEXT}
    for k, name in enumerate(names[1:] + [h for h, _ in hidden]):
        slots[name] = N_COMMON_PARAMS + k
    return slots


def generate_source(model: ModelDefinition) -> str:
    """Python source of the model's five kernels (see :mod:`spikegauge.models.generated`)."""
    states = _ordered_states(model)
    derivatives, hidden = _hoisted(model)
    slots = _param_slot(model, hidden)
    sym = dict(model.symbols, **{h: sympy.Symbol(h, real=True) for h, _ in hidden})
    rename = {sym[n]: sympy.Symbol("h_" + n.split(".")[1] if n.startswith("hidden.") else _local(n), real=True)
              for n in sym}
    f = [derivatives[s].xreplace(rename) for s in states]
    y = [rename[sym[s]] for s in states]
    n = len(states)
    jac = [[sympy.diff(f[i], y[j]) for j in range(n)] for i in range(n)]
    diag = [jac[i][i] for i in range(n)]
    a = [f[i] - diag[i] * y[i] for i in range(n)]
    reset = {states.index(s): e.xreplace(rename) for s, e in model.reset.items()}
    printer = _Printer({"fully_qualified_modules": True, "standard": "python3"})
    vector_printer = _VectorPrinter({"fully_qualified_modules": True, "standard": "python3"})

    def loads(exprs, n_state_loads=True):
        used = set().union(*[e.free_symbols for e in exprs]) if exprs else set()
        lines = []
        for k, s in enumerate(states):
            if rename[sym[s]] in used and n_state_loads:
                lines.append(f"    {_local(s)} = y[{k} * ys]")
        for name, slot in slots.items():
            if rename[sym[name]] in used:
                lines.append(f"    {rename[sym[name]]} = p[{slot} * ps]")
        return lines

    def body(exprs, targets):
        temps, reduced = sympy.cse(exprs, symbols=sympy.numbered_symbols("t_"))
        lines = loads([e for _, e in temps] + list(reduced))
        lines += [f"    {t} = {printer.doprint(e)}" for t, e in temps]
        lines += [f"    {target} = {printer.doprint(e)}" for target, e in zip(targets, reduced)]
        return lines

    out = [
        f'"""Kernels of model file {model.name!r} (generated from text sha256 {model.digest[:16]})."""',
        "import math",
        "from numba import cfunc",
        "from spikegauge.models.fastexp import exp as vector_exp",
        "from spikegauge.models.generated import (SIG_JAC, SIG_RESET, SIG_RHS, SIG_RHS_COLS, SIG_SPLIT,",
        "                                         safe_ratio, safe_ratio_slope, safe_ratio_vector, sign,",
        "                                         step)",
        "",
        "",
        "@cfunc(SIG_RHS, cache=True, error_model='numpy')",
        "def rhs(y, ys, p, ps, clamped, d, ds):",
    ]
    out += body(f, [f"f{i}" for i in range(n)])
    out.append("    d[0] = 0.0 if clamped else f0")
    out += [f"    d[{i} * ds] = f{i}" for i in range(1, n)]
    out += ["", "", "@cfunc(SIG_JAC, cache=True, error_model='numpy')",
            "def jac(y, ys, p, ps, clamped, J, js0, js1):"]
    flat = [jac[i][j] for i in range(n) for j in range(n)]
    out += body(flat, [f"j{i}_{j}" for i in range(n) for j in range(n)])
    for i in range(n):
        for j in range(n):
            value = f"0.0 if clamped else j0_{j}" if i == 0 else f"j{i}_{j}"
            out.append(f"    J[{i} * js0 + {j} * js1] = {value}")
    out += ["", "", "@cfunc(SIG_SPLIT, cache=True, error_model='numpy')",
            "def split(y, ys, p, ps, clamped, a, as_, b, bs):"]
    out += body(a + diag, [f"a{i}" for i in range(n)] + [f"b{i}" for i in range(n)])
    out.append("    a[0] = 0.0 if clamped else a0")
    out.append("    b[0] = 0.0 if clamped else b0")
    out += [f"    a[{i} * as_] = a{i}\n    b[{i} * bs] = b{i}" for i in range(1, n)]
    out += ["", "", "@cfunc(SIG_RHS_COLS, cache=True, error_model='numpy')",
            "def rhs_cols(Y, ys0, ys1, P, ps0, ps1, lo, hi, clamped, cs, F, fs0, fs1):"]
    # one loop per state: few inputs and one output each, which LLVM vectorises (one loop
    # for all states holds too many values at once)
    for k, e in enumerate(f):
        temps, (reduced,) = sympy.cse([e], symbols=sympy.numbered_symbols("t_"))
        used = set().union(e.free_symbols, *[x.free_symbols for _, x in temps])
        out += ["    for j in range(hi - lo):", "        i = lo + j"]
        out += [f"        {_local(s)} = Y[{q} * ys0 + j]" for q, s in enumerate(states) if rename[sym[s]] in used]
        out += [f"        {rename[sym[name]]} = P[{slot} * ps0 + i]" for name, slot in slots.items()
                if rename[sym[name]] in used]
        out += [f"        {t} = {vector_printer.doprint(x)}" for t, x in temps]
        value = vector_printer.doprint(reduced)
        out.append(f"        F[j] = 0.0 if clamped[j] else {value}" if k == 0 else f"        F[{k} * fs0 + j] = {value}")
    out += ["", "", "@cfunc(SIG_RESET, cache=True, error_model='numpy')", "def reset(y, ys, p, ps):"]
    if reset:
        keys = sorted(reset)
        out += body([reset[k] for k in keys], [f"r{k}" for k in keys])
        out += [f"    y[{k} * ys] = r{k}" for k in keys]
    else:
        out.append("    return")
    return "\n".join(out) + "\n"


def _generated_dir() -> Path:
    return Path(numba.config.CACHE_DIR) / "model-files"


def _write_once(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` unless it already holds it (keeps numba's cache stamp), atomically."""
    if path.exists() and path.read_text() == text:
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".tmp")
    with os.fdopen(fd, "w") as fh:
        fh.write(text)
    os.replace(tmp, path)


def _load_module(model: ModelDefinition):
    """The module of the model's kernels: generated (sympy) only when the cache folder lacks it.

    Named after the model text, this generator's version and numba's; the
    cache folder itself is named after spikegauge's kernel sources.
    """
    key = hashlib.sha256((GENERATOR_VERSION + numba.__version__ + model.text).encode()).hexdigest()[:20]
    name = f"spikegauge_model_{key}"
    if name in sys.modules:
        return sys.modules[name]
    path = _generated_dir() / f"{name}.py"
    if not path.exists():
        _write_once(path, generate_source(model))
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


_NUMPY_FUNCTIONS = [{
    "safe_ratio": lambda x: np.where(np.abs(x) < 1e-5, 1.0 + x * (0.5 + x / 12.0),
                                     -x / np.expm1(-np.where(x == 0, 1.0, x))),
}, "numpy"]


def _per_cell(expr, names: list):
    """numpy function of parameter columns (n,) -> (n,) for an expression of those names."""
    fn = sympy.lambdify([sympy.Symbol(n, real=True) for n in names], expr, modules=_NUMPY_FUNCTIONS)
    return lambda *cols: np.broadcast_to(np.asarray(fn(*cols), dtype=np.float64), cols[0].shape).copy()


def compile_model(model: ModelDefinition, slot: int) -> ModelSpec:
    """Compile a model file's kernels (or load them from the cache) into table row ``slot``.

    Returns the model's :class:`ModelSpec` with code ``FIRST_CODE + slot``.
    """
    try:
        module = _load_module(model)
    except Exception as exc:  # noqa: BLE001 - whatever numba says, the user gets one line naming the file
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{model.label}: the generated kernels do not compile ({type(exc).__name__}: "
                         f"{first})") from None
    install(slot, (module.rhs.address, module.jac.address, module.split.address, module.reset.address,
                   module.rhs_cols.address))

    states = _ordered_states(model)
    by_name = {s.name: s for s in model.states}
    pnames = _ordered_params(model)
    hidden = _hoisted(model)[1]
    slots = _param_slot(model, hidden)
    pinfo = {p.name: p for p in model.parameters}
    params = [ParamInfo(model.current, P_IEXT, pinfo[model.current].default,
                        "constant external current; bias and step drives add to it")]
    params += [ParamInfo(key, s, math.nan, doc) for key, s, doc in (
        (DERIVED_KEYS[0], P_VTH, "threshold of the spike state (from [spike] threshold)"),
        (DERIVED_KEYS[1], P_VRESET, "0 when the model resets at a spike, NaN when it does not"),
        (DERIVED_KEYS[2], P_TREF, "refractory hold (ms, from [spike] refractory)"))]
    params += [ParamInfo(name, slots[name], pinfo[name].default, "") for name in pnames[1:]]
    params += [ParamInfo(h, slots[h], math.nan, "a parameter-only part of the derivatives, computed per cell")
               for h, _ in hidden]
    hidden_values = [(slots[h], _per_cell(e, pnames)) for h, e in hidden]

    threshold = _per_cell(model.threshold, pnames)
    refractory = _per_cell(model.refractory, pnames) if model.refractory is not None else None
    has_reset = bool(model.reset)

    def derive(rows: np.ndarray) -> None:
        """Fill the derived slots of parameter rows (n, >= n_params) in place."""
        cols = [rows[:, slots[n]] for n in pnames]
        rows[:, P_VTH] = threshold(*cols)
        rows[:, P_VRESET] = 0.0 if has_reset else math.nan
        rows[:, P_TREF] = refractory(*cols) if refractory is not None else 0.0
        for k, fn in hidden_values:
            rows[:, k] = fn(*cols)

    spike_init = _per_cell(by_name[model.spike_state].initial, pnames)
    other_init = {s: _per_cell(by_name[s].initial, pnames + [model.spike_state]) for s in states[1:]}

    def initial(rows: np.ndarray, given: dict) -> np.ndarray:
        """Initial states (n, n_states): ``given`` (index -> values) first, the file's values for the rest."""
        cols = [rows[:, slots[n]] for n in pnames]
        y = np.empty((rows.shape[0], len(states)))
        y[:, 0] = given[0] if 0 in given else spike_init(*cols)
        for k, s in enumerate(states[1:], start=1):
            y[:, k] = given[k] if k in given else other_init[s](*cols, y[:, 0])
        return y

    scale = np.array([by_name[s].scale or PLACEHOLDER_SCALE for s in states])
    return ModelSpec(
        name=model.name,
        code=FIRST_CODE + slot,
        unit_system=model.units,
        state_names=tuple(states),
        params=tuple(sorted(params, key=lambda p: p.slot)),
        exc_state=states.index(model.excitatory),
        inh_state=states.index(model.inhibitory),
        weight_key=model.weight_key,
        current_key=model.current_key,
        scale=scale,
        has_physical_zero=np.array([k > 0 and not s.endswith("_mv") for k, s in enumerate(states)]),
        lower=np.array([by_name[s].lower for s in states]),
        upper=np.array([by_name[s].upper for s in states]),
        doc=model.description or f"model file {model.label}",
        source=model.source or f"model file {model.label}",
        extra={
            "fixed_params": DERIVED_KEYS + tuple(h for h, _ in hidden),
            "derive": derive,
            "initial": initial,
            "definition": model,
            "scale_given": np.array([by_name[s].scale is not None for s in states]),
            "param_ranges": {p.name: (p.lower, p.upper) for p in model.parameters},
            "inhibitory_sign": model.inhibitory_sign,
            "positive_params": (),
            "nonnegative_params": (),
        },
    )

