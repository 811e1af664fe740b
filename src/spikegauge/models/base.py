"""The contract every point-neuron model meets.

A model is described twice: once in Python (:class:`ModelSpec`: names, units,
defaults, scales, bounds) and once as numba kernels that act on a single cell
(``rhs``, ``jac``, ``split``, ``reset`` in :mod:`spikegauge.models.kernels`,
dispatched on the integer ``code``).

Layout shared by all models
---------------------------
State vector ``y`` of one cell, shape ``(n_states,)``: ``y[0]`` is the membrane
voltage (mV); the model names the indices of its excitatory and inhibitory
synaptic states (``exc_state``, ``inh_state``), which an arrival of that
receptor increments by the synapse weight.

Parameter vector ``p`` of one cell, shape ``(n_params,)``; the first four slots
are common to every model:

=========  ======================================================================
``P_IEXT``  external current (bias + current-step drive), model current unit
``P_VTH``   threshold / detection / peak voltage (mV); a spike is an upward
            crossing of this value by ``y[0]``
``P_VRESET`` reset voltage (mV); NaN for models without a reset
``P_TREF``  refractory period (ms); 0 for none. While refractory the voltage is
            clamped (``clamped=True`` in the kernels: dV/dt = 0), all other
            states keep evolving.
=========  ======================================================================
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

P_IEXT = 0
P_VTH = 1
P_VRESET = 2
P_TREF = 3
N_COMMON_PARAMS = 4

RECEPTOR_EXC = 0
RECEPTOR_INH = 1
RECEPTOR_CURRENT = 2  # an event that adds its weight to p[P_IEXT] (current-step drive)


@dataclass(frozen=True)
class ParamInfo:
    """One model parameter: its key in scenario files (unit in the name), slot, default."""

    key: str
    slot: int
    default: float
    doc: str = ""


@dataclass(frozen=True)
class ModelSpec:
    """Python-side description of one model family.

    Attributes
    ----------
    name : str
        Name used in scenario files (``"lif-current"``...).
    code : int
        Integer dispatched on by the numba kernels.
    unit_system : str
        ``"point"`` (mV, ms, pF, nS, pA) or ``"area"`` (mV, ms, uF/cm2, mS/cm2, uA/cm2).
    state_names : tuple of str
        Scenario key of each state's initial value, unit in the name (``"v_mv"``).
    params : tuple of ParamInfo
        Every parameter including the four common slots.
    exc_state, inh_state : int
        Indices of the synaptic states incremented by excitatory / inhibitory arrivals.
    weight_key : str
        Scenario key of a synaptic weight for this model (``"weight_pa"``...).
    current_key : str
        Scenario key of a current amplitude (``"i_pa"`` or ``"i_ua_per_cm2"``).
    scale : ndarray, shape (n_states,)
        Typical magnitude of each state (used as ``atol`` scale in error norms).
    has_physical_zero : ndarray of bool, shape (n_states,)
        True where the relative tolerance applies (gates, conductances); False for voltage.
    lower, upper : ndarray, shape (n_states,)
        Bounds outside which the run is declared diverged.
    doc : str
        The model's description (its module docstring); the first line is a one-line summary.
    source : str
        The published source of the equations and default values (``spikegauge models NAME``).
    """

    name: str
    code: int
    unit_system: str
    state_names: tuple
    params: tuple
    exc_state: int
    inh_state: int
    weight_key: str
    current_key: str
    scale: np.ndarray
    has_physical_zero: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    doc: str = ""
    source: str = ""
    extra: dict = field(default_factory=dict)

    @property
    def n_states(self) -> int:
        return len(self.state_names)

    @property
    def n_params(self) -> int:
        return len(self.params)

    def param_keys(self) -> list[str]:
        return [p.key for p in self.params]

    def default_params(self) -> np.ndarray:
        """Parameter vector with every default, shape (n_params,)."""
        out = np.empty(self.n_params)
        for p in self.params:
            out[p.slot] = p.default
        return out
