"""Model files: a point-neuron model written as data (TOML), read and checked.

:func:`read_model_text` turns the text of a model file into a
:class:`ModelDefinition` (sympy expressions, nothing compiled) or raises
:class:`~spikegauge.errors.InputError` with one line naming the file, the key
and the problem. The layout (all keys but the optional ones required)::

    [model]        name, units ("point" or "area"); optional description, source
    [parameters]   name = default, or { default, lower, upper }; unit in the name
    [states]       name = initial, or { initial, scale, lower, upper }; initial may be
                   an expression of parameters and the spike state (e.g. a gate's
                   steady state at the initial voltage)
    [derivatives]  state = "expression of states and parameters" (per ms)
    [spike]        state, threshold (expression of parameters); optional reset
                   (table state = expression of states and parameters, applied at
                   once) and refractory (expression of parameters, ms: the spike
                   state is held that long)
    [inputs]       excitatory, inhibitory (states an arrival increments by its
                   weight; "-state" for an inhibitory input that decrements it, the
                   weight staying positive), current (the parameter bias and step drives add to:
                   a current in the unit system's unit, or dimensionless)

Unit suffixes follow the scenario files: point units ``_mv _ms _pf _nsiemens
_pa``, area units ``_mv _ms _uf_per_cm2 _msiemens_per_cm2 _ua_per_cm2``; a
name without a unit suffix is dimensionless. A suffix of the other unit system
is refused.
"""
from __future__ import annotations

import hashlib
import keyword
import math
import re
import tomllib
from dataclasses import dataclass, field

import sympy

from ..errors import InputError
from .expressions import FUNCTIONS, ExpressionError, parse_expression

UNIT_SYSTEMS = ("point", "area")
_FOREIGN_UNITS = {
    "point": ("uf_per_cm2", "msiemens_per_cm2", "ua_per_cm2"),
    "area": ("pf", "nsiemens", "pa"),
}
_WEIGHT_SUFFIXES = ("msiemens_per_cm2", "ua_per_cm2", "nsiemens", "pa", "mv")
_CURRENT_SUFFIXES = {"point": "pa", "area": "ua_per_cm2"}
_NAME = re.compile(r"^[a-z][a-z0-9_]{0,63}$")
_MODEL_NAME = re.compile(r"^[a-z][a-z0-9-]{0,63}$")
_RESERVED = set(FUNCTIONS) | {"t", "e", "pi", "inf", "nan", "safe_ratio_slope"}
_SECTIONS = ("model", "parameters", "states", "derivatives", "spike", "inputs")


@dataclass(frozen=True)
class Parameter:
    """A parameter of a model file: its default and the range a scenario value must keep."""

    name: str
    default: float
    lower: float = -math.inf
    upper: float = math.inf


@dataclass(frozen=True)
class State:
    """A state: its initial value (number or expression), typical scale (None: measured) and bounds."""

    name: str
    initial: sympy.Expr
    scale: float | None
    lower: float
    upper: float


@dataclass(frozen=True)
class ModelDefinition:
    """Everything a model file says, checked; expressions as sympy, symbols real.

    ``states`` keeps the file's order; ``symbols`` maps every parameter and
    state name to its sympy symbol. ``digest`` is the SHA-256 of the text.
    """

    name: str
    units: str
    label: str
    text: str
    digest: str
    parameters: tuple
    states: tuple
    derivatives: dict
    spike_state: str
    threshold: sympy.Expr
    reset: dict
    refractory: sympy.Expr | None
    excitatory: str
    inhibitory: str
    current: str
    inhibitory_sign: float = 1.0
    description: str = ""
    source: str = ""
    symbols: dict = field(default_factory=dict)

    @property
    def weight_key(self) -> str:
        """Scenario key of a synaptic weight: ``weight_`` and the unit of the incremented state."""
        return "weight_" + unit_suffix(self.excitatory) if unit_suffix(self.excitatory) else "weight"

    @property
    def current_key(self) -> str:
        """Scenario key of a current amplitude: ``i_`` and the unit of the current parameter."""
        suffix = unit_suffix(self.current)
        return "i_" + suffix if suffix else "i"


def unit_suffix(name: str) -> str:
    """The weight/current unit suffix a name ends with (``"nsiemens"``...), or ``""``."""
    for suffix in _WEIGHT_SUFFIXES:
        if name.endswith("_" + suffix):
            return suffix
    return ""


def read_model_text(text: str, label: str) -> ModelDefinition:
    """Read and check a model file's text; ``label`` names it in messages (its path).

    Raises
    ------
    InputError
        One line ``label: key: problem`` for anything wrong, before any compilation.
    """
    def err(key, msg):
        return InputError(f"{label}: {key}: {msg}")

    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{label}: not a TOML file ({' '.join(str(exc).split())})") from None
    for key in raw:
        if key not in _SECTIONS:
            raise err(key, f"unknown section; a model file has {', '.join(_SECTIONS)}")
    for key in _SECTIONS:
        if key not in raw:
            raise err(key, "missing section")
        if not isinstance(raw[key], dict):
            raise err(key, "must be a table")

    model = raw["model"]
    _keys(err, "model", model, ("name", "units", "description", "source"), ("name", "units"))
    name = model["name"]
    if not isinstance(name, str) or not _MODEL_NAME.match(name):
        raise err("model.name", "must be lower-case letters, digits and '-', starting with a letter")
    units = model["units"]
    if units not in UNIT_SYSTEMS:
        raise err("model.units", f"must be one of {', '.join(UNIT_SYSTEMS)}, got {units!r}")
    for key in ("description", "source"):
        if key in model and not isinstance(model[key], str):
            raise err(f"model.{key}", "must be a string")

    names = set()

    def check_name(where, n):
        if not _NAME.match(n):
            raise err(where, "names are lower-case letters, digits and '_', starting with a letter")
        if n in _RESERVED or keyword.iskeyword(n):
            raise err(where, f"{n!r} is reserved (a function or constant name)")
        if n in names:
            raise err(where, f"{n!r} is both a parameter and a state")
        for short, long in (("ns", "nsiemens"), ("ms_per_cm2", "msiemens_per_cm2")):
            if n.endswith("_" + short) or f"_{short}_" in n:
                raise err(where, f"a conductance spells siemens: '_{long}', not '_{short}' "
                                 f"(which reads as a time)")
        for foreign in _FOREIGN_UNITS[units]:
            if n.endswith("_" + foreign) or f"_{foreign}_" in n:
                raise err(where, f"unit suffix '_{foreign}' does not fit {units} units")
        names.add(n)

    params = []
    for pname, spec in raw["parameters"].items():
        where = f"parameters.{pname}"
        check_name(where, pname)
        if isinstance(spec, dict):
            _keys(err, where, spec, ("default", "lower", "upper"), ("default",))
            default = _number(err, f"{where}.default", spec["default"])
            lower = _number(err, f"{where}.lower", spec.get("lower", -math.inf), allow_inf=True)
            upper = _number(err, f"{where}.upper", spec.get("upper", math.inf), allow_inf=True)
        else:
            default, lower, upper = _number(err, where, spec), -math.inf, math.inf
        if not lower <= upper:
            raise err(where, f"lower {lower:g} is above upper {upper:g}")
        if not lower <= default <= upper:
            raise err(f"{where}.default", f"{default:g} lies outside its declared range [{lower:g}, {upper:g}]")
        params.append(Parameter(pname, default, lower, upper))
    if not raw["states"]:
        raise err("states", "a model needs at least one state")

    state_names = list(raw["states"])
    for sname in state_names:
        check_name(f"states.{sname}", sname)
    symbols = {n: sympy.Symbol(n, real=True) for n in [p.name for p in params] + state_names}
    param_symbols = {p.name: symbols[p.name] for p in params}

    def expr(where, text, allowed):
        try:
            return parse_expression(text, allowed)
        except ExpressionError as exc:
            scope = "" if allowed is symbols else " (only parameters may appear here)"
            raise err(where, f"{exc}{scope}") from None

    spike = raw["spike"]
    _keys(err, "spike", spike, ("state", "threshold", "reset", "refractory"), ("state", "threshold"))
    spike_state = spike["state"]
    if spike_state not in state_names:
        raise err("spike.state", f"{spike_state!r} is not a state; states: {', '.join(state_names)}")
    initial_scope = dict(param_symbols, **{spike_state: symbols[spike_state]})

    states = []
    for sname in state_names:
        spec = raw["states"][sname]
        where = f"states.{sname}"
        if isinstance(spec, dict):
            _keys(err, where, spec, ("initial", "scale", "lower", "upper"), ("initial",))
            init_raw = spec["initial"]
            scale = _number(err, f"{where}.scale", spec["scale"]) if "scale" in spec else None
            if scale is not None and not scale > 0:
                raise err(f"{where}.scale", f"must be positive, got {scale:g}")
            lower = _number(err, f"{where}.lower", spec.get("lower", -math.inf), allow_inf=True)
            upper = _number(err, f"{where}.upper", spec.get("upper", math.inf), allow_inf=True)
        else:
            init_raw, scale, lower, upper = spec, None, -math.inf, math.inf
        if not lower < upper:
            raise err(where, f"lower {lower:g} must lie below upper {upper:g}")
        if isinstance(init_raw, str):
            scope = param_symbols if sname == spike_state else initial_scope
            initial = expr(f"{where}.initial", init_raw, scope)
        else:
            initial = sympy.Float(_number(err, f"{where}.initial", init_raw))
            if not lower <= float(initial) <= upper:
                raise err(f"{where}.initial", f"{float(initial):g} lies outside [{lower:g}, {upper:g}]")
        states.append(State(sname, initial, scale, lower, upper))

    derivatives = {}
    for sname, text_ in raw["derivatives"].items():
        if sname not in state_names:
            raise err(f"derivatives.{sname}", f"not a state; states: {', '.join(state_names)}")
        derivatives[sname] = expr(f"derivatives.{sname}", text_, symbols)
    for sname in state_names:
        if sname not in derivatives:
            raise err("derivatives", f"state {sname!r} has no derivative")

    threshold = expr("spike.threshold", spike["threshold"], param_symbols)
    reset = {}
    if "reset" in spike:
        if not isinstance(spike["reset"], dict) or not spike["reset"]:
            raise err("spike.reset", "must be a table of state = expression")
        for sname, text_ in spike["reset"].items():
            if sname not in state_names:
                raise err(f"spike.reset.{sname}", f"not a state; states: {', '.join(state_names)}")
            reset[sname] = expr(f"spike.reset.{sname}", text_, symbols)
    refractory = expr("spike.refractory", spike["refractory"], param_symbols) if "refractory" in spike else None
    if refractory is not None and not reset:
        raise err("spike.refractory", "a refractory hold needs a reset (the state would be held above threshold)")

    inputs = raw["inputs"]
    _keys(err, "inputs", inputs, ("excitatory", "inhibitory", "current"), ("excitatory", "inhibitory", "current"))
    inhibitory_sign = 1.0
    if isinstance(inputs["inhibitory"], str) and inputs["inhibitory"].startswith("-"):
        inhibitory_sign, inputs = -1.0, dict(inputs, inhibitory=inputs["inhibitory"][1:].strip())
    for key in ("excitatory", "inhibitory"):
        if not isinstance(inputs[key], str):
            raise err(f"inputs.{key}", "must be the name of a state")
        if inputs[key] not in state_names:
            raise err(f"inputs.{key}", f"{inputs[key]!r} is not a state; states: {', '.join(state_names)}")
    if unit_suffix(inputs["excitatory"]) != unit_suffix(inputs["inhibitory"]):
        raise err("inputs", f"the excitatory and inhibitory states must share a unit "
                            f"({inputs['excitatory']!r}, {inputs['inhibitory']!r}): one weight key serves both")
    current = inputs["current"]
    if not isinstance(current, str) or current not in param_symbols:
        raise err("inputs.current", f"{current!r} is not a parameter; the bias and step drives add to a parameter")
    want = _CURRENT_SUFFIXES[units]
    if unit_suffix(current) not in (want, "") or current.endswith("_mv"):
        raise err("inputs.current", f"{current!r} must end in '_{want}' ({units} units), "
                                    "or carry no unit suffix (a dimensionless drive)")

    return ModelDefinition(
        name=name, units=units, label=label, text=text,
        digest=hashlib.sha256(text.encode()).hexdigest(),
        parameters=tuple(params), states=tuple(states), derivatives=derivatives,
        spike_state=spike_state, threshold=threshold, reset=reset, refractory=refractory,
        excitatory=inputs["excitatory"], inhibitory=inputs["inhibitory"], current=current,
        inhibitory_sign=inhibitory_sign,
        description=model.get("description", ""), source=model.get("source", ""), symbols=symbols,
    )


def _keys(err, where, table, allowed, required):
    if not isinstance(table, dict):
        raise err(where, "must be a table")
    for key in table:
        if key not in allowed:
            raise err(f"{where}.{key}", f"unknown key; allowed: {', '.join(allowed)}")
    for key in required:
        if key not in table:
            raise err(where, f"missing key '{key}'")


def _number(err, where, raw, allow_inf=False) -> float:
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise err(where, f"must be a number, got {type(raw).__name__}")
    value = float(raw)
    if math.isnan(value) or (math.isinf(value) and not allow_inf):
        raise err(where, f"must be a finite number, got {raw!r}")
    return value
