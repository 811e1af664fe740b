"""The sweep: which integration settings a profile runs.

A sweep is a list of settings dicts (``strategy``, ``stepper``, ``dt_ms``,
``crossing``, ``delivery``, ``rtol``, ``atol``), each resolved by
:func:`spikegauge.simulation.resolve_settings`, run once per seed.

Default sweep (:func:`default_sweep`), 75 points:

* fixed step, seven stepper/crossing/delivery combinations over five time steps
  halving from a model-appropriate start (0.2 ms for integrate-and-fire
  models, 0.1 ms for AdEx, 0.04 ms for Hodgkin–Huxley; the smallest start of
  the scenario's models):

  - ``euler`` + ``step`` + ``grid``: the naive loop, spikes on the grid;
  - ``expeuler`` + ``linear`` + ``exact`` and ``backward-euler`` + ``linear``
    + ``exact``: the first-order alternatives (stable for stiff cells);
  - ``rk2`` + ``linear`` + ``exact``: second order throughout;
  - ``trapezoidal`` + ``hermite`` + ``exact``: second order and A-stable (the
    implicit trapezoidal rule; Hermite interpolation uses the derivative it
    has at both step ends);
  - ``rk4`` + ``hermite`` + ``exact``: fourth order throughout;
  - ``rk4`` + ``hermite`` + ``grid``: what grid delivery costs a high-order stepper.

  Pairing each stepper with the interpolation of its own order is what the
  spike-time error orders call for (Hansel et al. 1998; Shelley & Tao 2001):
  a lower-order interpolation caps the order, a higher one buys nothing.
  Every delay must be at least one step (a window is a whole number of steps
  and no longer than the smallest delay), so points whose time step exceeds
  the smallest delay are left out.
* global and local adaptive, each with every error-controlled stepper
  (``bs32``, ``dp54``, the Rosenbrock scheme and the variable-order ``bdf``),
  over rtol 1e-2 ... 1e-6 (decades), ``atol = rtol`` (in units of each state's
  scale).

``--quick`` (:func:`quick_sweep`) runs 8 points for tests and smoke runs.

A scenario may replace the default with a ``[sweep]`` table, and a separate
sweep file holds the same table::

    [[sweep.grid]]                 # every combination of the lists below
    strategy = "fixed"
    stepper = ["rk2", "rk4"]
    dt_ms = [0.1, 0.05, 0.025]
    crossing = "hermite"
    delivery = ["grid", "exact"]

    [[sweep.grid]]
    strategy = ["local-adaptive", "global-adaptive"]
    stepper = "dp54"
    rtol = [1e-3, 1e-4, 1e-5]

Each ``[[sweep.grid]]`` entry expands to the product of its values (a single
value counts as a one-element list), in the order written.
"""
from __future__ import annotations

import itertools
import math
import tomllib
from pathlib import Path

from ..errors import InputError
from ..integrate.tableaux import ADAPTIVE_STEPPER_CODES
from ..simulation import resolve_settings

SETTING_KEYS = ("strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "atol")
"""Keys a sweep entry may give, in the order they appear in tables."""

DT_START_MS = {"lif-current": 0.2, "lif-conductance": 0.2, "adex": 0.1,
               "hh-squid": 0.04, "hh-interneuron": 0.04}
"""Largest time step of the default sweep per model (ms), common practice: about a
tenth of the fastest time scale that matters for spike timing (synaptic and
membrane time constants for integrate-and-fire cells, the ~1 ms spike of
Hodgkin–Huxley cells)."""

N_DT = 5
"""Time steps per fixed combination: the start and four halvings."""

FIXED_COMBOS = (
    ("euler", "step", "grid"),
    ("expeuler", "linear", "exact"),
    ("backward-euler", "linear", "exact"),
    ("rk2", "linear", "exact"),
    ("trapezoidal", "hermite", "exact"),
    ("rk4", "hermite", "exact"),
    ("rk4", "hermite", "grid"),
)
"""(stepper, crossing, delivery) of the default sweep's fixed-step points."""

ADAPTIVE_STEPPERS = tuple(ADAPTIVE_STEPPER_CODES)
"""Every stepper with an error estimate (explicit bs32, dp54, a Rosenbrock scheme, the
variable-order bdf)."""
RTOLS = (1e-2, 1e-3, 1e-4, 1e-5, 1e-6)


def dt_start_ms(model_names) -> float:
    """Largest default time step (ms) for a set of model names: the smallest start among them."""
    return min(DT_START_MS.get(m, 0.05) for m in model_names)


def _dts(start: float) -> list[float]:
    return [start / 2 ** k for k in range(N_DT)]


def default_sweep(scenario, d_min_ms: float = math.inf) -> list[dict]:
    """The default sweep for a scenario (see the module docstring).

    Parameters
    ----------
    scenario : Scenario
    d_min_ms : float
        Smallest synaptic delay of the network (ms); fixed-step points with a
        larger time step are left out.

    Returns
    -------
    list of dict
        Resolved settings, fixed points first, then global, then local adaptive.
    """
    start = dt_start_ms({g.model for g in scenario.groups})
    out = []
    for stepper, crossing, delivery in FIXED_COMBOS:
        for dt in _dts(start):
            if dt > d_min_ms:  # a step may not exceed the smallest delay (windows are whole steps)
                continue
            out.append(dict(strategy="fixed", stepper=stepper, dt_ms=dt, crossing=crossing,
                            delivery=delivery))
    for strategy in ("global-adaptive", "local-adaptive"):
        for stepper in ADAPTIVE_STEPPERS:
            for rtol in RTOLS:
                out.append(dict(strategy=strategy, stepper=stepper, rtol=rtol))
    return [resolve_settings(None, **s) for s in out]


def quick_sweep(scenario, d_min_ms: float = math.inf) -> list[dict]:
    """A small sweep (8 points) for tests and smoke runs: two fixed steppers at
    three time steps, and each adaptive strategy with dp54 at one tolerance."""
    start = dt_start_ms({g.model for g in scenario.groups})
    out = [dict(strategy="fixed", stepper=st, dt_ms=dt, crossing=cr, delivery="exact")
           for st, cr in (("rk2", "linear"), ("rk4", "hermite")) for dt in _dts(start)[:3]]
    out += [dict(strategy=s, stepper="dp54", rtol=1e-4) for s in ("global-adaptive", "local-adaptive")]
    return [resolve_settings(None, **s) for s in out]


def parse_sweep(table, where: str) -> list[dict]:
    """Expand a ``[sweep]`` table into resolved settings.

    Parameters
    ----------
    table : dict
        The ``[sweep]`` table (a dict with a ``grid`` list of tables).
    where : str
        File name for messages.

    Raises
    ------
    InputError
        Unknown keys, bad values or impossible combinations, naming the key path.
    """
    if not isinstance(table, dict):
        raise InputError(f"{where}: sweep: must be a table")
    unknown = set(table) - {"grid"}
    if unknown:
        raise InputError(f"{where}: sweep.{sorted(unknown)[0]}: unknown key; allowed: grid")
    grids = table.get("grid")
    if not isinstance(grids, list) or not grids:
        raise InputError(f"{where}: sweep.grid: needs at least one [[sweep.grid]] table")
    out = []
    for i, entry in enumerate(grids):
        path = f"sweep.grid[{i}]"
        if not isinstance(entry, dict):
            raise InputError(f"{where}: {path}: must be a table")
        for key in entry:
            if key not in SETTING_KEYS:
                raise InputError(f"{where}: {path}.{key}: unknown key; allowed: {', '.join(SETTING_KEYS)}")
        if "strategy" not in entry:
            raise InputError(f"{where}: {path}.strategy: missing (fixed, global-adaptive, local-adaptive)")
        keys = [k for k in SETTING_KEYS if k in entry]
        values = []
        for k in keys:
            v = entry[k] if isinstance(entry[k], list) else [entry[k]]
            if not v:
                raise InputError(f"{where}: {path}.{k}: empty list")
            for x in v:
                numeric = k in ("dt_ms", "rtol", "atol")
                if numeric and (isinstance(x, bool) or not isinstance(x, (int, float))
                                or not (x > 0 and math.isfinite(x))):
                    raise InputError(f"{where}: {path}.{k}: must be positive numbers, got {x!r}")
                if not numeric and not isinstance(x, str):
                    raise InputError(f"{where}: {path}.{k}: must be strings, got {x!r}")
            values.append(v)
        for combo in itertools.product(*values):
            s = dict(zip(keys, combo))
            if s["strategy"] == "exact":
                raise InputError(f"{where}: {path}.strategy: 'exact' is the reference, not a sweep point")
            try:
                out.append(resolve_settings(None, **s))
            except InputError as exc:
                raise InputError(f"{where}: {path}: {exc}") from None
    return _unique(out)


def load_sweep_file(path) -> list[dict]:
    """Read a sweep file: a TOML file holding a ``[sweep]`` table."""
    p = Path(path)
    try:
        raw = tomllib.loads(p.read_text())
    except FileNotFoundError:
        raise InputError(f"{p}: file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: invalid TOML: {exc}") from None
    if set(raw) != {"sweep"}:
        raise InputError(f"{p}: a sweep file holds one [sweep] table, found: {', '.join(sorted(raw)) or 'nothing'}")
    return parse_sweep(raw["sweep"], str(p))


def _unique(settings: list[dict]) -> list[dict]:
    seen, out = set(), []
    for s in settings:
        key = tuple(sorted(s.items()))
        if key not in seen:
            seen.add(key)
            out.append(s)
    return out


def setting_label(s: dict) -> str:
    """Short human-readable name of a setting, e.g. ``fixed rk4 dt=0.05 hermite/exact``."""
    if s["strategy"] == "fixed":
        return f"fixed {s['stepper']} dt={s['dt_ms']:g} {s['crossing']}/{s['delivery']}"
    if s["strategy"] == "exact":
        return "exact"
    return f"{s['strategy']} {s['stepper']} rtol={s['rtol']:g}"


def split_sweep_table(text: str, label: str) -> tuple[str, dict | None]:
    """Separate a scenario's ``[sweep]`` table from the rest of its text.

    The scenario proper (without the sweep) is what identifies a point: changing
    the sweep must not invalidate points already run. Lines from a ``[sweep]``
    or ``[[sweep.…]]`` header up to the next header that is not part of the
    sweep are removed; the result is checked by parsing both texts, so a
    layout this line-based cut cannot handle is an error, not a silent change.

    Returns
    -------
    scenario_text : str
    sweep : dict or None
        The ``[sweep]`` table, None if the file has none.
    """
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return text, None  # the scenario parser reports the error with its position
    if "sweep" not in raw:
        return text, None
    kept, inside = [], False
    for line in text.splitlines(keepends=True):
        head = line.strip()
        if head.startswith("["):
            name = head.strip("[] \t").split("#")[0].strip().strip("]").strip()
            inside = name == "sweep" or name.startswith("sweep.")
        if not inside:
            kept.append(line)
    stripped = "".join(kept)
    rest = {k: v for k, v in raw.items() if k != "sweep"}
    try:
        ok = tomllib.loads(stripped) == rest
    except tomllib.TOMLDecodeError:
        ok = False
    if not ok:
        raise InputError(f"{label}: sweep: cannot separate the [sweep] table from the scenario "
                         f"(a line inside it starts with '['); write each list on one line or "
                         f"move the table to a sweep file (--sweep)")
    return stripped, raw["sweep"]
