"""The built-in models as data: what ``spikegauge models`` prints.

:func:`model_table` lists every model (name, one-line description, unit
system); :func:`describe_model` gives one model's scenario keys: its states
(``[group.initial]``) with units, resting values and typical scales, its
parameters (``[group.parameters]``) with defaults, units and descriptions,
its weight and current keys, and the published source of its equations.
Everything comes from the models' own :class:`~spikegauge.models.base.ModelSpec`,
so the listing cannot drift from what the scenario validator accepts.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .models import BUILT_IN, MODELS, get_model, load_model_file, rest_state
from .models.base import ModelSpec

UNIT_SYSTEMS = {
    "point": "mV, ms, pF, nS, pA",
    "area": "mV, ms, µF/cm², mS/cm², µA/cm²",
}
"""The units of each unit system, as the scenario keys spell them."""

# Unit suffixes of scenario keys, longest first so that "_msiemens_per_cm2"
# is not read as "_cm2" of something else.
_SUFFIX_UNITS = (
    ("_msiemens_per_cm2", "mS/cm²"),
    ("_ua_per_cm2", "µA/cm²"),
    ("_uf_per_cm2", "µF/cm²"),
    ("_nsiemens", "nS"),
    ("_mv", "mV"),
    ("_ms", "ms"),
    ("_pf", "pF"),
    ("_pa", "pA"),
    ("_hz", "Hz"),
    ("_c", "°C"),
)


def unit_of(key: str) -> str:
    """The unit a scenario key spells in its suffix; ``"1"`` for a key without one (gates).

    >>> unit_of("g_na_msiemens_per_cm2"), unit_of("weight_nsiemens"), unit_of("h")
    ('mS/cm²', 'nS', '1')
    """
    for suffix, unit in _SUFFIX_UNITS:
        if key.endswith(suffix):
            return unit
    return "1"


@dataclass(frozen=True)
class ModelInfo:
    """One built-in model as a user sees it in a scenario file.

    Attributes
    ----------
    name : str
        The value of ``model`` in a ``[[group]]`` table.
    description : str
        One line: what the model is.
    unit_system : str
        ``"point"`` or ``"area"`` (see :data:`UNIT_SYSTEMS`).
    source : str
        The published source of the equations and default values.
    states : pandas.DataFrame
        One row per state, in state order: ``key`` (the ``[group.initial]``
        key), ``unit``, ``initial`` (the resting state at the default
        parameters, where a cell starts when the scenario does not say),
        ``scale`` (typical magnitude, the absolute tolerance's unit in adaptive
        runs), ``lower`` and ``upper`` (a run that leaves them has diverged).
    parameters : pandas.DataFrame
        One row per parameter: ``key`` (the ``[group.parameters]`` key),
        ``unit``, ``default``, ``fixed`` (True where a scenario may not set it)
        and ``description``.
    weight_key, current_key : str
        The key of a synaptic weight (``[[pathway]]``, ``[[drive]]``) and of a
        current amplitude (``[[drive]]`` kinds ``bias`` and ``step``).
    equations : tuple of str
        The model's equations, one per line (a model file's as written in it).
    """

    name: str
    description: str
    unit_system: str
    source: str
    states: pd.DataFrame
    parameters: pd.DataFrame
    weight_key: str
    current_key: str
    equations: tuple = ()


def _summary_line(spec: ModelSpec) -> str:
    lines = [line.strip() for line in spec.doc.strip().splitlines()]
    return lines[0] if lines else ""


def model_table() -> pd.DataFrame:
    """Every built-in model: columns ``name``, ``description``, ``unit_system``, ``units``."""
    rows = [dict(name=s.name, description=_summary_line(s), unit_system=s.unit_system,
                 units=UNIT_SYSTEMS[s.unit_system]) for s in MODELS.values() if s.name in BUILT_IN]
    return pd.DataFrame(rows).astype({"name": "string", "description": "string",
                                      "unit_system": "string", "units": "string"})


def describe_model(name: str) -> ModelInfo:
    """The scenario keys of model ``name`` with units, defaults and sources.

    Raises
    ------
    InputError
        If no built-in model has that name (the message lists them).
    """
    spec = load_model_file(name) if str(name).endswith(".toml") else get_model(name)
    if "initial" in spec.extra:  # a model file: where its cells start unless the scenario says
        p = spec.default_params()
        spec.extra["derive"](p[None, :])
        rest = spec.extra["initial"](p[None, :], {})[0]
    else:
        rest = rest_state(spec, spec.default_params())  # the default bias current is 0 in every model
    states = pd.DataFrame(dict(
        key=pd.array(spec.state_names, dtype="string"),
        unit=pd.array([unit_of(k) for k in spec.state_names], dtype="string"),
        initial=rest.astype(np.float64),
        scale=np.asarray(spec.scale, dtype=np.float64),
        lower=np.asarray(spec.lower, dtype=np.float64),
        upper=np.asarray(spec.upper, dtype=np.float64),
    ))
    fixed = set(spec.extra.get("fixed_params", ()))
    shown = [p for p in spec.params if "definition" not in spec.extra or p.key not in fixed]
    params = pd.DataFrame(dict(
        key=pd.array([p.key for p in shown], dtype="string"),
        unit=pd.array([unit_of(p.key) for p in shown], dtype="string"),
        default=np.array([p.default for p in shown], dtype=np.float64),
        fixed=np.array([p.key in fixed for p in shown], dtype=bool),
        description=pd.array([p.doc for p in shown], dtype="string"),
    ))
    return ModelInfo(name=spec.name, description=_summary_line(spec), unit_system=spec.unit_system,
                     source=spec.source, states=states, parameters=params,
                     weight_key=spec.weight_key, current_key=spec.current_key, equations=_equations(spec))


def _equations(spec: ModelSpec) -> tuple:
    """A model file's equations as written; a built-in model's from its docstring's equation block."""
    definition = spec.extra.get("definition")
    if definition is not None:
        lines = [f"d{s}/dt = {' '.join(str(definition.derivatives[s]).split())}" for s in spec.state_names]
        lines.append(f"spike: {spec.state_names[0]} crosses {definition.threshold} upwards")
        for state, e in definition.reset.items():
            lines.append(f"at a spike: {state} <- {e}")
        if definition.refractory is not None:
            lines.append(f"then {spec.state_names[0]} is held for {definition.refractory} ms")
        sign = "decrements" if definition.inhibitory_sign < 0 else "increments"
        lines.append(f"an excitatory arrival increments {definition.excitatory}, "
                     f"an inhibitory one {sign} {definition.inhibitory}, by the weight")
        return tuple(lines)
    doc = spec.doc.splitlines()
    for i, line in enumerate(doc):
        if line.rstrip().endswith("::"):
            block = []
            for follow in doc[i + 1:]:
                if follow.strip() and not follow.startswith("    "):
                    break
                block.append(follow.strip())
            return tuple(line for line in block if line)
    return ()
