"""Scenario files: TOML in, validated frozen objects out.

A scenario describes one network and its input: ``[scenario]`` (name,
``duration_ms``, ``seed``, optional ``max_memory_gb``), an optional
``[integration]`` table of default settings, ``[[group]]`` tables (cells of one
model), ``[[pathway]]`` tables (connections between groups) and ``[[drive]]``
tables (external input). The format reference is in DEVELOPERS.md.

Everything is checked here, before any network array is allocated, and every
problem is an :class:`~spikegauge.errors.InputError` whose message starts with
the file name and the key path, e.g.
``demo.toml: group[1].parameters.tau_m_ms: must be positive, got -3``.
Array-of-table entries are numbered from 0 in file order. Files the scenario
refers to (per-cell values, edge lists, spike lists) are read and checked here
too, so a loaded :class:`Scenario` is complete and self-contained.
"""
from __future__ import annotations

import difflib
import hashlib
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .distributions import ValueSpec, check_sign, finite_number, parse_value_spec, type_name
from .errors import InputError
from .formats.sonata_edges import PATHWAY_KEYS as SONATA_PATHWAY_KEYS
from .formats.sonata_edges import is_hdf5, pathway_edge_columns, refuse_sonata_keys
from .models import BUILT_IN, MODELS, max_params, max_states, model_from_text
from .models.base import RECEPTOR_EXC, RECEPTOR_INH, ModelSpec

STRATEGIES = ("fixed", "global-adaptive", "local-adaptive", "exact")
CROSSINGS = ("step", "linear", "hermite", "dense")
DELIVERIES = ("grid", "exact")
CONNECTS = ("sources-per-target", "random", "one-to-one", "all-to-all", "edge-list")
RECEPTORS = {"excitatory": RECEPTOR_EXC, "inhibitory": RECEPTOR_INH}
DRIVE_KINDS = ("poisson", "bias", "step", "spikes")

# Bytes per synapse while building: the four final arrays (32 B) plus the
# per-pathway source/target/delay/weight arrays and the sort permutation that
# exist at the same time.
BUILD_BYTES_PER_SYNAPSE = 80
# Bytes per explicit drive event (time, cell, receptor, weight).
BYTES_PER_EVENT = 32
# Per cell: parameters and initial state held by the network and copied by a
# driver, plus about ten state-sized work vectors of a multi-stage stepper.
STATE_COPIES = 12
PARAM_COPIES = 2


@dataclass(frozen=True)
class Integration:
    """Default integration settings of a scenario; None where the file says nothing.

    Command-line options override these; checking that a combination makes sense
    (e.g. crossing ``dense`` only with an adaptive strategy) is the engine's job.
    """

    strategy: str | None = None
    stepper: str | None = None
    dt_ms: float | None = None
    crossing: str | None = None
    delivery: str | None = None
    rtol: float | None = None
    atol: float | None = None

    def as_dict(self) -> dict:
        """The settings the file gives, as a plain dict."""
        return {k: v for k, v in self.__dict__.items() if v is not None}


@dataclass(frozen=True)
class Group:
    """A set of identical cells of one model.

    ``parameters`` and ``initial`` map scenario keys to value specifications;
    parameters not named keep the model's defaults, states not named start at
    the model's resting state.
    """

    name: str
    size: int
    model: str
    parameters: dict = field(default_factory=dict)
    initial: dict = field(default_factory=dict)
    model_text: str | None = None
    """Text of the group's model file; None for a built-in model."""
    model_label: str = ""
    """Where the model file came from (its path), for messages."""

    @property
    def spec(self) -> ModelSpec:
        if self.model_text is not None:  # compiled once per process, wherever the scenario travels
            return model_from_text(self.model_text, self.model_label)
        return MODELS[self.model]


@dataclass(frozen=True)
class EdgeList:
    """Connections read from a file; indices are within the source / target group."""

    path: Path
    source: np.ndarray = field(repr=False, compare=False)     # int64 (n,)
    target: np.ndarray = field(repr=False, compare=False)     # int64 (n,)
    delay_ms: np.ndarray = field(repr=False, compare=False)   # float64 (n,)
    weight: np.ndarray | None = field(default=None, repr=False, compare=False)  # float64 (n,) or None


@dataclass(frozen=True)
class Pathway:
    """Connections from one group to another (or to itself).

    ``connect`` says how cells are paired: ``sources-per-target`` (every target
    gets ``sources_per_target`` distinct sources), ``random`` (each ordered pair
    independently with probability ``p_connect``), ``one-to-one``, ``all-to-all``
    or ``edge-list`` (pairs read from the file ``edges``). ``weight`` is in the
    target model's weight unit; it is None only for an ``edge-list`` pathway
    whose file has a weight column. ``delay_ms`` is None only for ``edge-list``
    (delays come from the file).
    """

    source: str
    target: str
    source_index: int
    target_index: int
    connect: str
    receptor: str
    self_connections: bool
    weight: ValueSpec | None
    delay_ms: ValueSpec | None
    sources_per_target: int | None = None
    p_connect: float | None = None
    edges: EdgeList | None = None

    def expected_count(self, n_source: int, n_target: int) -> float:
        """Expected number of connections (exact for every kind but ``random``)."""
        same = self.source_index == self.target_index and not self.self_connections
        if self.connect == "sources-per-target":
            return float(self.sources_per_target * n_target)
        if self.connect == "random":
            return self.p_connect * n_target * (n_source - (1 if same else 0))
        if self.connect == "one-to-one":
            return float(n_target)
        if self.connect == "all-to-all":
            return float(n_target * (n_source - (1 if same else 0)))
        return float(self.edges.source.size)


@dataclass(frozen=True)
class SpikeList:
    """Spike times read from a file: ``cell`` is an index within the target group."""

    path: Path
    cell: np.ndarray = field(repr=False, compare=False)      # int64 (n,)
    time_ms: np.ndarray = field(repr=False, compare=False)   # float64 (n,)


@dataclass(frozen=True)
class Drive:
    """External input into one group.

    Kinds and the fields they use:

    * ``poisson``: ``rate_hz`` (per cell), ``weight`` (a number), ``receptor``,
      ``start_ms``, ``stop_ms``;
    * ``bias``: ``current`` (per cell), added to the cells' constant current;
    * ``step``: ``current`` (per cell) switched on at ``start_ms`` and off at ``stop_ms``;
    * ``spikes``: ``spikes`` (from a file), ``weight`` (a number), ``receptor``.

    Currents and weights are in the target model's units.
    """

    kind: str
    target: str
    target_index: int
    receptor: str | None = None
    rate_hz: ValueSpec | None = None
    weight: float | None = None
    current: ValueSpec | None = None
    start_ms: float = 0.0
    stop_ms: float = math.inf
    spikes: SpikeList | None = None


@dataclass(frozen=True)
class Scenario:
    """A validated scenario.

    Attributes
    ----------
    path : Path or None
        File it was read from (None for text parsed directly).
    text : str
        The TOML text, kept so runs can record exactly what they ran.
    name : str
    duration_ms : float
    seed : int
    max_memory_gb : float or None
        Memory the user allows, overriding the machine's available memory in the check.
    integration : Integration
    groups, pathways, drives : tuple
    """

    path: Path | None
    text: str = field(repr=False)
    name: str
    duration_ms: float
    seed: int
    max_memory_gb: float | None
    integration: Integration
    groups: tuple
    pathways: tuple
    drives: tuple

    @property
    def n_cells(self) -> int:
        return sum(g.size for g in self.groups)

    @property
    def group_first(self) -> np.ndarray:
        """First cell id of each group, then n_cells; shape (n_groups + 1,)."""
        return np.concatenate([[0], np.cumsum([g.size for g in self.groups])]).astype(np.int64)

    @property
    def digest(self) -> str:
        """SHA-256 of the scenario text and of the model files it uses (other files it refers to are not included)."""
        h = hashlib.sha256(self.text.encode())
        for g in self.groups:
            if g.model_text is not None:
                h.update(g.model_text.encode())
        return h.hexdigest()

    def expected_synapses(self) -> float:
        """Expected total number of connections."""
        sizes = [g.size for g in self.groups]
        return sum(p.expected_count(sizes[p.source_index], sizes[p.target_index]) for p in self.pathways)


# ---------------------------------------------------------------------------
# Loading


def load_scenario(path, *, max_memory_gb: float | None = None) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : str or Path
        The TOML file. Files it names are relative to its directory.
    max_memory_gb : float, optional
        Memory (GB) the network may use, overriding both the scenario's
        ``max_memory_gb`` and the machine's available memory.

    Raises
    ------
    InputError
        Any problem with the file, with the file name and key path or line.
    """
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise InputError(f"{path}: file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read: {exc}") from None
    return parse_scenario(text, source=path, max_memory_gb=max_memory_gb)


def parse_scenario(text: str, *, source: Path | str | None = None,
                   max_memory_gb: float | None = None) -> Scenario:
    """Validate scenario TOML text; see :func:`load_scenario`.

    ``source`` names the file in messages and anchors relative file paths
    (the current directory when None).
    """
    src = Path(source) if source is not None else None
    label = str(src) if src is not None else "<scenario>"
    base_dir = src.parent if src is not None else Path.cwd()
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{label}: {_toml_position(str(exc))}invalid TOML: {_toml_reason(str(exc))}") from None
    p = _Parser(label, base_dir)
    scenario = p.scenario(raw, src, text)
    _check_memory(scenario, label, max_memory_gb)
    return scenario


def _toml_position(msg: str) -> str:
    m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
    if m:
        return f"line {m.group(1)}, column {m.group(2)}: "
    if "(at end of document)" in msg:
        return "end of file: "
    return ""


def _toml_reason(msg: str) -> str:
    return re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg)


class _Parser:
    """Walks the raw TOML dict; every method raises InputError with a key path."""

    def __init__(self, label: str, base_dir: Path):
        self.label = label
        self.base_dir = base_dir
        self.model_files: dict[str, tuple[str, str]] = {}  # model name -> (path, text) of the files used

    # -- small checks ---------------------------------------------------------

    def err(self, where: str, msg: str) -> InputError:
        return InputError(f"{self.label}: {where}: {msg}" if where else f"{self.label}: {msg}")

    def keys(self, where: str, table, allowed, required=(), hint_for=None):
        """Check a table's keys: unknown ones (with a suggestion) and missing ones."""
        if not isinstance(table, dict):
            raise self.err(where, f"must be a table, got {type_name(table)}")
        for key in table:
            if key not in allowed:
                extra = hint_for(key) if hint_for else None
                if extra:
                    raise self.err(f"{where}.{key}" if where else key, extra)
                close = difflib.get_close_matches(key, list(allowed), n=1)
                sugg = f" (did you mean '{close[0]}'?)" if close else ""
                raise self.err(f"{where}.{key}" if where else key,
                               f"unknown key{sugg}; allowed: {', '.join(allowed)}")
        for key in required:
            if key not in table:
                raise self.err(where, f"missing key '{key}'")

    def number(self, where: str, raw, *, positive=False, nonnegative=False) -> float:
        x = finite_number(raw, f"{self.label}: {where}")
        if positive and not x > 0:
            raise self.err(where, f"must be positive, got {_fmt(x)}")
        if nonnegative and x < 0:
            raise self.err(where, f"must not be negative, got {_fmt(x)}")
        return x

    def integer(self, where: str, raw, *, positive=False, nonnegative=False) -> int:
        if isinstance(raw, bool) or not isinstance(raw, int):
            raise self.err(where, f"must be an integer, got {type_name(raw)} {raw!r}")
        if positive and raw <= 0:
            raise self.err(where, f"must be positive, got {raw}")
        if nonnegative and raw < 0:
            raise self.err(where, f"must not be negative, got {raw}")
        return raw

    def string(self, where: str, raw, choices=None) -> str:
        if not isinstance(raw, str):
            raise self.err(where, f"must be a string, got {type_name(raw)} {raw!r}")
        if choices is not None and raw not in choices:
            close = difflib.get_close_matches(raw, list(choices), n=1)
            sugg = f" (did you mean '{close[0]}'?)" if close else ""
            raise self.err(where, f"unknown value '{raw}'{sugg}; choose one of: {', '.join(choices)}")
        return raw

    def boolean(self, where: str, raw) -> bool:
        if not isinstance(raw, bool):
            raise self.err(where, f"must be true or false, got {type_name(raw)} {raw!r}")
        return raw

    def value(self, where: str, raw, n_values=None, *, positive=False, nonnegative=False):
        spec = parse_value_spec(raw, f"{self.label}: {where}", self.base_dir, n_values)
        if positive or nonnegative:
            check_sign(spec, f"{self.label}: {where}", positive=positive, nonnegative=nonnegative)
        return spec

    def array_of_tables(self, raw: dict, key: str) -> list:
        items = raw.get(key, [])
        if not isinstance(items, list) or not all(isinstance(t, dict) for t in items):
            raise self.err(key, f"must be an array of tables, written [[{key}]]")
        return items

    # -- sections -------------------------------------------------------------

    def scenario(self, raw: dict, src: Path | None, text: str) -> Scenario:
        # A [sweep] table belongs to the profile (spikegauge.profile.sweep reads and checks it);
        # a run of the scenario ignores it.
        self.keys("", raw, ("scenario", "integration", "group", "pathway", "drive", "sweep"),
                  ("scenario", "group"))
        sc = raw["scenario"]
        self.keys("scenario", sc, ("name", "duration_ms", "seed", "max_memory_gb"),
                  ("name", "duration_ms", "seed"))
        name = self.string("scenario.name", sc["name"])
        duration = self.number("scenario.duration_ms", sc["duration_ms"], positive=True)
        seed = self.integer("scenario.seed", sc["seed"], nonnegative=True)
        max_mem = (self.number("scenario.max_memory_gb", sc["max_memory_gb"], positive=True)
                   if "max_memory_gb" in sc else None)
        integration = self.integration(raw.get("integration", {}))

        group_tables = self.array_of_tables(raw, "group")
        if not group_tables:
            raise self.err("group", "a scenario needs at least one [[group]]")
        groups = tuple(self.group(i, t) for i, t in enumerate(group_tables))
        names = [g.name for g in groups]
        for i, n in enumerate(names):
            if n in names[:i]:
                raise self.err(f"group[{i}].name", f"'{n}' is already the name of group[{names.index(n)}]")
        pathways = tuple(self.pathway(i, t, groups) for i, t in enumerate(self.array_of_tables(raw, "pathway")))
        drives = tuple(self.drive(i, t, groups, duration) for i, t in enumerate(self.array_of_tables(raw, "drive")))
        return Scenario(path=src, text=text, name=name, duration_ms=duration, seed=seed,
                        max_memory_gb=max_mem, integration=integration, groups=groups,
                        pathways=pathways, drives=drives)

    def integration(self, t) -> Integration:
        # The stepper names belong to the integrators; imported here only, so
        # the rest of this module stays below the engine in the layering.
        from .integrate.steppers import STEPPER_CODES
        from .integrate.tableaux import ADAPTIVE_STEPPER_CODES

        w = "integration"
        self.keys(w, t, ("strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "atol"))
        strategy = self.string(f"{w}.strategy", t["strategy"], STRATEGIES) if "strategy" in t else None
        stepper = None
        if "stepper" in t:
            fixed, adaptive = tuple(STEPPER_CODES), tuple(ADAPTIVE_STEPPER_CODES)
            choices = {"fixed": fixed, "global-adaptive": adaptive, "local-adaptive": adaptive}.get(
                strategy, fixed + adaptive)
            stepper = self.string(f"{w}.stepper", t["stepper"], choices)
        # Settings that belong to another strategy than the one the file names.
        foreign = {"fixed": ("rtol", "atol"), "global-adaptive": ("dt_ms", "delivery"),
                   "local-adaptive": ("dt_ms", "delivery"),
                   "exact": ("stepper", "dt_ms", "crossing", "delivery", "rtol", "atol")}.get(strategy, ())
        for key in foreign:
            if key in t:
                raise self.err(f"{w}.{key}", f"does not apply to strategy \"{strategy}\"")
        if strategy in ("global-adaptive", "local-adaptive") and t.get("crossing", "dense") != "dense":
            raise self.err(f"{w}.crossing", "adaptive strategies locate crossings on their dense output: "
                                            "\"dense\" is the only choice")
        if strategy == "fixed" and t.get("crossing") == "dense":
            raise self.err(f"{w}.crossing", "\"dense\" is for adaptive strategies; the fixed strategy "
                                            "takes step, linear or hermite")
        return Integration(
            strategy=strategy,
            stepper=stepper,
            dt_ms=self.number(f"{w}.dt_ms", t["dt_ms"], positive=True) if "dt_ms" in t else None,
            crossing=self.string(f"{w}.crossing", t["crossing"], CROSSINGS) if "crossing" in t else None,
            delivery=self.string(f"{w}.delivery", t["delivery"], DELIVERIES) if "delivery" in t else None,
            rtol=self.number(f"{w}.rtol", t["rtol"], positive=True) if "rtol" in t else None,
            atol=self.number(f"{w}.atol", t["atol"], positive=True) if "atol" in t else None,
        )

    def group(self, i: int, t) -> Group:
        w = f"group[{i}]"
        self.keys(w, t, ("name", "size", "model", "parameters", "initial"), ("name", "size", "model"))
        name = self.string(f"{w}.name", t["name"])
        if not name:
            raise self.err(f"{w}.name", "must not be empty")
        size = self.integer(f"{w}.size", t["size"], positive=True)
        model_text, model_label = None, ""
        if isinstance(t["model"], str) and t["model"].endswith(".toml"):
            path = (self.base_dir / t["model"]).resolve()
            try:
                model_text = path.read_text()
            except (OSError, UnicodeDecodeError) as exc:
                raise self.err(f"{w}.model", f"cannot read the model file {path} ({exc.__class__.__name__})") from None
            model_label = str(path)
            spec = model_from_text(model_text, model_label)
            model = spec.name
            other = self.model_files.setdefault(model, (model_label, model_text))
            if other[1] != model_text:
                raise self.err(f"{w}.model", f"{model_label} and {other[0]} are different model files with the "
                                             f"same name {model!r}; rename one ([model] name)")
        else:
            model = self.string(f"{w}.model", t["model"], BUILT_IN)
            spec = MODELS[model]

        params_raw = t.get("parameters", {})
        fixed = tuple(spec.extra.get("fixed_params", ()))
        keys = tuple(k for k in spec.param_keys() if k not in fixed)

        def param_hint(k):
            if k in fixed:
                return f"fixed in {model} and cannot be set; {model} takes: {', '.join(keys)}"
            return _foreign_key_hint(k, spec, "parameter", keys)

        self.keys(f"{w}.parameters", params_raw, keys, hint_for=param_hint)
        params = {}
        ranges = spec.extra.get("param_ranges", {})
        for key, raw in params_raw.items():
            where = f"{w}.parameters.{key}"
            # a model file's parameters keep the ranges the file declares, not the name-based rules
            positive, nonnegative = _param_sign(key) if model_text is None else (False, False)
            params[key] = self.value(where, raw, size, positive=positive, nonnegative=nonnegative)
            if key in ranges:
                lo, hi = params[key].support()
                if lo < ranges[key][0] or hi > ranges[key][1]:
                    raise self.err(where, f"values must lie within [{_fmt(ranges[key][0])}, {_fmt(ranges[key][1])}] "
                                          f"(declared in {model_label}), got the range [{_fmt(lo)}, {_fmt(hi)}]")

        init_raw = t.get("initial", {})
        states = tuple(spec.state_names)
        self.keys(f"{w}.initial", init_raw, states,
                  hint_for=lambda k: _foreign_key_hint(k, spec, "state", states))
        initial = {}
        for key, raw in init_raw.items():
            where = f"{w}.initial.{key}"
            k = states.index(key)
            # Gates and conductances have a physical zero and cannot start below it.
            vspec = self.value(where, raw, size, nonnegative=bool(spec.has_physical_zero[k]))
            lo, hi = vspec.support()
            if lo < spec.lower[k] or hi > spec.upper[k]:
                raise self.err(where, f"values must lie within [{_fmt(spec.lower[k])}, {_fmt(spec.upper[k])}] "
                                      f"(the bounds of {model}), got the range [{_fmt(lo)}, {_fmt(hi)}]")
            initial[key] = vspec
        return Group(name, size, model, params, initial, model_text, model_label)

    def group_ref(self, where: str, raw, groups) -> int:
        names = [g.name for g in groups]
        name = self.string(where, raw)
        if name not in names:
            close = difflib.get_close_matches(name, names, n=1)
            sugg = f" (did you mean '{close[0]}'?)" if close else ""
            raise self.err(where, f"no group named '{name}'{sugg}; groups: {', '.join(names)}")
        return names.index(name)

    def pathway(self, i: int, t, groups) -> Pathway:
        w = f"pathway[{i}]"
        if not isinstance(t, dict):
            raise self.err(w, "must be a table")
        for key in ("source", "target"):
            if key not in t:
                raise self.err(w, f"missing key '{key}'")
        si = self.group_ref(f"{w}.source", t["source"], groups)
        ti = self.group_ref(f"{w}.target", t["target"], groups)
        src, tgt = groups[si], groups[ti]
        spec = tgt.spec
        wkey = spec.weight_key
        allowed = ("source", "target", "connect", "sources_per_target", "p_connect", "edges",
                   "self_connections", "receptor", wkey, "delay_ms")
        allowed += SONATA_PATHWAY_KEYS  # node-id offsets etc. of an edge list given as a SONATA edges file
        self.keys(w, t, allowed, ("connect", "receptor"),
                  hint_for=lambda k: _weight_key_hint(k, spec, tgt.name))
        connect = self.string(f"{w}.connect", t["connect"], CONNECTS)
        receptor = self.string(f"{w}.receptor", t["receptor"], tuple(RECEPTORS))
        self_conn = self.boolean(f"{w}.self_connections", t.get("self_connections", False))
        same = si == ti and not self_conn
        connect_keys = {"sources-per-target": "sources_per_target", "random": "p_connect", "edge-list": "edges"}
        for c, k in connect_keys.items():
            if k in t and connect != c:
                raise self.err(f"{w}.{k}", f"only used with connect = \"{c}\", not \"{connect}\"")
            if connect == c and k not in t:
                raise self.err(w, f"missing key '{k}' (connect = \"{connect}\")")

        sources_per_target = p_connect = edges = None
        if connect == "sources-per-target":
            sources_per_target = self.integer(f"{w}.sources_per_target", t["sources_per_target"], positive=True)
            available = src.size - (1 if same else 0)
            if sources_per_target > available:
                why = f"group '{src.name}' has {src.size} cells" + (
                    ", minus the target cell itself since self_connections = false" if same else "")
                raise self.err(f"{w}.sources_per_target", f"{sources_per_target} distinct sources asked for, "
                                                          f"but only {available} are available ({why})")
        elif connect == "random":
            p_connect = self.number(f"{w}.p_connect", t["p_connect"])
            if not 0 <= p_connect <= 1:
                raise self.err(f"{w}.p_connect", f"must lie in [0, 1], got {_fmt(p_connect)}")
        elif connect == "one-to-one":
            if src.size != tgt.size:
                raise self.err(f"{w}.connect", f"one-to-one needs groups of equal size; '{src.name}' has "
                                               f"{src.size} cells, '{tgt.name}' has {tgt.size}")
            if same:
                raise self.err(f"{w}.connect", "one-to-one from a group to itself connects each cell to "
                                               "itself; set self_connections = true")
        elif connect == "all-to-all" and same and src.size == 1:
            raise self.err(f"{w}.connect", f"group '{src.name}' has one cell and self_connections = false, "
                                           "so all-to-all makes no connection")

        if connect == "edge-list":
            if "delay_ms" in t:
                raise self.err(f"{w}.delay_ms", "delays of an edge-list pathway come from the file's delay_ms column")
            edges = self.edge_file(f"{w}.edges", t["edges"], src, tgt, same, t)
            if edges.weight is not None and wkey in t:
                raise self.err(f"{w}.{wkey}", "the file has a weight column; give weights in one place only")
            if edges.weight is None and wkey not in t:
                raise self.err(w, f"missing key '{wkey}' (the file has no weight column)")
            delay = None
        else:
            refuse_sonata_keys(f"{self.label}: {w}", t)
            if "delay_ms" not in t:
                raise self.err(w, "missing key 'delay_ms'")
            if wkey not in t:
                raise self.err(w, f"missing key '{wkey}' (weights into '{tgt.name}', a {tgt.model} group)")
            delay = self.value(f"{w}.delay_ms", t["delay_ms"], positive=True)
        weight = self.value(f"{w}.{wkey}", t[wkey], nonnegative=True) if wkey in t else None
        return Pathway(source=src.name, target=tgt.name, source_index=si, target_index=ti, connect=connect,
                       receptor=receptor, self_connections=self_conn, weight=weight, delay_ms=delay,
                       sources_per_target=sources_per_target, p_connect=p_connect, edges=edges)

    def edge_file(self, where: str, raw, src: Group, tgt: Group, same: bool, table: dict) -> EdgeList:
        path = (self.base_dir / self.string(where, raw)).resolve()
        pathway = f"{self.label}: {where.rpartition('.')[0]}"
        if is_hdf5(path):  # a SONATA edges file, told by its content (formats/sonata_edges.py)
            cols = pathway_edge_columns(path, pathway, table, src, tgt, same, self.base_dir)
        else:
            refuse_sonata_keys(pathway, table, path)
            cols = _read_table(path, f"{self.label}: {where}", ("source", "target", "delay_ms"), ("weight",))
        name = path.name
        source = self._index_column(where, name, cols["source"], "source", src)
        target = self._index_column(where, name, cols["target"], "target", tgt)
        delay = cols["delay_ms"]
        bad = np.flatnonzero(~(delay > 0))
        if bad.size:
            raise self.err(where, f"{name}: row {bad[0]}: delay_ms must be positive, got {_fmt(delay[bad[0]])}")
        weight = cols.get("weight")
        if weight is not None:
            bad = np.flatnonzero(weight < 0)
            if bad.size:
                raise self.err(where, f"{name}: row {bad[0]}: weight must not be negative, got {_fmt(weight[bad[0]])}")
        if same:
            bad = np.flatnonzero(source == target)
            if bad.size:
                raise self.err(where, f"{name}: row {bad[0]} connects cell {source[bad[0]]} to itself; "
                                      "set self_connections = true to allow it")
        return EdgeList(path, source, target, delay, weight)

    def _index_column(self, where, name, values, col, group) -> np.ndarray:
        idx = values.astype(np.int64)
        bad = np.flatnonzero((idx != values) | (idx < 0) | (idx >= group.size))
        if bad.size:
            raise self.err(where, f"{name}: row {bad[0]}: {col} {_fmt(values[bad[0]])} is not a cell index "
                                  f"of group '{group.name}' (0..{group.size - 1})")
        return idx

    def drive(self, i: int, t, groups, duration: float) -> Drive:
        w = f"drive[{i}]"
        if not isinstance(t, dict):
            raise self.err(w, "must be a table")
        for key in ("target", "kind"):
            if key not in t:
                raise self.err(w, f"missing key '{key}'")
        ti = self.group_ref(f"{w}.target", t["target"], groups)
        tgt = groups[ti]
        spec = tgt.spec
        kind = self.string(f"{w}.kind", t["kind"], DRIVE_KINDS)
        wkey, ikey = spec.weight_key, spec.current_key
        allowed = {
            "poisson": ("target", "kind", "rate_hz", wkey, "receptor", "start_ms", "stop_ms"),
            "bias": ("target", "kind", ikey),
            "step": ("target", "kind", ikey, "start_ms", "stop_ms"),
            "spikes": ("target", "kind", "file", wkey, "receptor"),
        }[kind]
        required = {
            "poisson": ("rate_hz", wkey, "receptor"),
            "bias": (ikey,),
            "step": (ikey, "start_ms"),
            "spikes": ("file", wkey, "receptor"),
        }[kind]
        self.keys(w, t, allowed, required,
                  hint_for=lambda k: _weight_key_hint(k, spec, tgt.name) or _current_key_hint(k, spec, tgt.name))
        base = dict(kind=kind, target=tgt.name, target_index=ti)
        if kind in ("poisson", "step"):
            start = self.number(f"{w}.start_ms", t.get("start_ms", 0.0), nonnegative=True)
            stop = self.number(f"{w}.stop_ms", t["stop_ms"], positive=True) if "stop_ms" in t else duration
            if not start < stop:
                raise self.err(f"{w}.stop_ms", f"must be after start_ms = {_fmt(start)}, got {_fmt(stop)}")
            base.update(start_ms=start, stop_ms=stop)
        if kind in ("poisson", "spikes"):
            base.update(receptor=self.string(f"{w}.receptor", t["receptor"], tuple(RECEPTORS)),
                        weight=self.number(f"{w}.{wkey}", t[wkey], nonnegative=True))
        if kind == "poisson":
            base.update(rate_hz=self.value(f"{w}.rate_hz", t["rate_hz"], tgt.size, nonnegative=True))
        elif kind in ("bias", "step"):
            base.update(current=self.value(f"{w}.{ikey}", t[ikey], tgt.size))
        else:
            base.update(spikes=self.spike_file(f"{w}.file", t["file"], tgt))
        return Drive(**base)

    def spike_file(self, where: str, raw, tgt: Group) -> SpikeList:
        path = (self.base_dir / self.string(where, raw)).resolve()
        cols = _read_table(path, f"{self.label}: {where}", ("cell", "time_ms"), ())
        cell = self._index_column(where, path.name, cols["cell"], "cell", tgt)
        time = cols["time_ms"]
        bad = np.flatnonzero(time < 0)
        if bad.size:
            raise self.err(where, f"{path.name}: row {bad[0]}: time_ms must not be negative, got {_fmt(time[bad[0]])}")
        return SpikeList(path, cell, time)


# ---------------------------------------------------------------------------
# Helpers


def _param_sign(key: str) -> tuple[bool, bool]:
    """(must be positive, must not be negative) for a parameter, from its unit suffix.

    Capacitances and time constants are positive; other times (refractory
    periods) and maximal conductances (``g_...``) are non-negative; voltages,
    currents and other factors may take any sign here.
    """
    if key.endswith(("_pf", "_uf_per_cm2")) or (key.startswith("tau") and key.endswith("_ms")):
        return True, False
    if key.endswith("_ms") or (key.startswith("g_") and key.endswith(("_nsiemens", "_msiemens_per_cm2"))):
        return False, True
    return False, False


def _owners(key: str, kind: str) -> list[str]:
    """Models that have ``key`` as a parameter (kind='parameter') or state name."""
    out = []
    for name, spec in MODELS.items():
        keys = spec.param_keys() if kind == "parameter" else spec.state_names
        if key in keys:
            out.append(name)
    return out


def _foreign_key_hint(key: str, spec: ModelSpec, kind: str, allowed) -> str | None:
    owners = _owners(key, kind)
    if not owners:
        return None
    return (f"not a {kind} of {spec.name} (it belongs to {', '.join(owners)}); "
            f"{spec.name} takes: {', '.join(allowed)}")


def _weight_key_hint(key: str, spec: ModelSpec, group: str) -> str | None:
    if key.startswith("weight_") and key != spec.weight_key:
        return (f"weights into group '{group}' ({spec.name}, {spec.unit_system} units) are given as "
                f"'{spec.weight_key}'")
    return None


def _current_key_hint(key: str, spec: ModelSpec, group: str) -> str | None:
    if key.startswith("i_") and key != spec.current_key:
        return (f"currents into group '{group}' ({spec.name}, {spec.unit_system} units) are given as "
                f"'{spec.current_key}'")
    return None


def _read_table(path: Path, where: str, required: tuple, optional: tuple) -> dict:
    """Read named numeric columns from ``.npz`` or ``.csv`` (header row with the names).

    Returns a dict of float64 arrays for the required columns and the optional
    ones present.
    """
    if not path.is_file():
        raise InputError(f"{where}: file not found: {path}")
    suffix = path.suffix.lower()
    try:
        if suffix == ".npz":
            with np.load(path, allow_pickle=False) as z:
                data = {k: np.asarray(z[k]) for k in z.files}
        elif suffix in (".csv", ".txt"):
            frame = pd.read_csv(path, sep="," if suffix == ".csv" else r"\s+", comment="#")
            frame.columns = [str(c).strip() for c in frame.columns]
            data = {c: frame[c].to_numpy() for c in frame.columns}
        else:
            raise InputError(f"{where}: {path.name}: expected a .npz or .csv file")
    except InputError:
        raise
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"{where}: cannot read {path.name}: {exc}") from None
    known = required + optional
    for col in data:
        if col not in known:
            close = difflib.get_close_matches(col, list(known), n=1)
            sugg = f" (did you mean '{close[0]}'?)" if close else ""
            raise InputError(f"{where}: {path.name}: unknown column '{col}'{sugg}; expected: {', '.join(known)}")
    out = {}
    n = None
    for col in known:
        if col not in data:
            if col in required:
                raise InputError(f"{where}: {path.name}: missing column '{col}'")
            continue
        arr = data[col]
        if arr.ndim != 1 or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
            raise InputError(f"{where}: {path.name}: column '{col}' must be a 1-D array of numbers")
        arr = arr.astype(np.float64)
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise InputError(f"{where}: {path.name}: row {bad[0]}: {col} is not a finite number")
        if n is not None and arr.size != n:
            raise InputError(f"{where}: {path.name}: columns differ in length ({n} and {arr.size})")
        n = arr.size
        out[col] = arr
    return out


def _fmt(x: float) -> str:
    if math.isfinite(x) and x == int(x) and abs(x) < 1e15:
        return str(int(x))
    return f"{x:g}"


# ---------------------------------------------------------------------------
# Memory


def estimate_memory_bytes(scenario: Scenario) -> int:
    """Estimated peak memory (bytes) of building and integrating the network.

    Counts synapse arrays during the build, per-cell parameters, state and
    stepper work vectors, and explicit drive events. Poisson drive is
    generated block by block and recorded spikes depend on the activity, so
    neither is counted.
    """
    n_cells = scenario.n_cells
    per_cell = 8 * (PARAM_COPIES * max_params() + STATE_COPIES * max_states())
    n_events = 0
    for d in scenario.drives:
        if d.kind == "step":
            n_events += 2 * scenario.groups[d.target_index].size
        elif d.kind == "spikes":
            n_events += d.spikes.cell.size
    return int(BUILD_BYTES_PER_SYNAPSE * scenario.expected_synapses() + per_cell * n_cells
               + BYTES_PER_EVENT * n_events)


def available_memory_bytes() -> int:
    """Memory this process can still use: MemAvailable, capped by a cgroup limit if any."""
    avail = None
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    avail = int(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if avail is None:
        avail = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    for limit_file, usage_file in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                                   ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
                                    "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        try:
            limit = Path(limit_file).read_text().strip()
            usage = int(Path(usage_file).read_text().strip())
        except (OSError, ValueError):
            continue
        if limit.isdigit():
            avail = min(avail, max(int(limit) - usage, 0))
        break
    return avail


def _check_memory(scenario: Scenario, label: str, max_memory_gb: float | None) -> None:
    estimate = estimate_memory_bytes(scenario)
    if max_memory_gb is not None:
        if not (math.isfinite(max_memory_gb) and max_memory_gb > 0):
            raise InputError(f"max_memory_gb must be a positive number, got {max_memory_gb}")
        limit, what = max_memory_gb * 1e9, f"the {max_memory_gb:g} GB allowed by max_memory_gb"
    elif scenario.max_memory_gb is not None:
        limit, what = scenario.max_memory_gb * 1e9, f"the {scenario.max_memory_gb:g} GB allowed by scenario.max_memory_gb"
    else:
        limit = available_memory_bytes()
        what = f"the {limit / 1e9:.2f} GB available on this machine"
    if estimate > limit:
        raise InputError(f"{label}: the network needs about {estimate / 1e9:.2f} GB, more than {what}; "
                         "set max_memory_gb in [scenario] (or --max-memory-gb) to go ahead anyway")
    spikes = spike_count_bound(scenario)
    if estimate + BYTES_PER_SPIKE * spikes > limit:
        raise InputError(
            f"{label}: the run may record up to {spikes:.3g} spikes ({BYTES_PER_SPIKE * spikes / 1e9:.3g} GB "
            f"at one spike per refractory period, or per ms without one), more than {what}; shorten "
            "duration_ms, or set max_memory_gb in [scenario] (or --max-memory-gb) to go ahead anyway")
    drive_block = drive_block_events(scenario)
    if BYTES_PER_EVENT * drive_block > limit:
        raise InputError(
            f"{label}: the Poisson drive holds about {drive_block:.3g} events per "
            f"{DRIVE_BLOCK_MS:g} ms block ({BYTES_PER_EVENT * drive_block / 1e9:.3g} GB), more than "
            f"{what}; lower rate_hz, or set max_memory_gb in [scenario] (or --max-memory-gb)")


BYTES_PER_SPIKE = 16
"""A recorded spike: cell id (int64) and time (float64)."""

DRIVE_BLOCK_MS = 10.0
"""Length of the blocks the Poisson drive is generated in (network.drive uses this value)."""


def spike_count_bound(scenario: Scenario) -> float:
    """Upper bound on the spikes a run records: one per refractory period per cell.

    Models without a refractory period (the Hodgkin–Huxley ones) are bounded by
    one spike per ms, about the width of their action potential (common practice).
    """
    total = 0.0
    for g in scenario.groups:
        tref = g.parameters.get("t_ref_ms")
        tref_ms = tref.support()[0] if tref is not None else g.spec.default_params()[3]
        per_ms = 1.0 / max(float(tref_ms), 1.0) if math.isfinite(tref_ms) else 1.0
        total += g.size * scenario.duration_ms * per_ms
    return total


def drive_block_events(scenario: Scenario) -> float:
    """Expected Poisson drive events in one generation block, all drives together."""
    total = 0.0
    for d in scenario.drives:
        if d.kind == "poisson":
            rate_max = d.rate_hz.support()[1]
            total += scenario.groups[d.target_index].size * rate_max * DRIVE_BLOCK_MS / 1000.0
    return total
