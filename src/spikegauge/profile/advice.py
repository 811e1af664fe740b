"""Advice for the production run: which setting, and what it will cost.

The cost model is built from the sweep's counts, not its wall times, so it
carries over to another machine; wall time is then counts times the measured
seconds per cell-step and per arrival.

Counts for a run of ``N`` cells over ``T`` ms (per-cell firing rate and drive
taken from the sweep; synapses per cell from the scenario's pathways at the
new size, so ``random`` pathways grow with the network):

* arrivals ``A = N T (d + nu K)``: drive events per cell and ms ``d``,
  firing rate ``nu`` (per ms) times synapses per cell ``K``;
* fixed step: cell-steps ``N T (1/dt + beta a)``, ``a = A/(N T)``; ``beta`` is
  the extra steps per arrival measured in the sweep (exact delivery splits a
  step at each arrival; grid delivery does not);
* local adaptive: every arrival ends the cell's step, and between arrivals the
  step count grows with the cell's own firing (spikes are where the error
  control shortens the step): cell-steps ``N T (a + c0 + c1 nu)``, with
  ``c0 + c1 nu`` fitted over the cells whose steps were recorded, against
  their firing rates;
* global adaptive: every arrival or spike anywhere ends the one global step,
  so the network takes ``g0 + E`` steps per ms with ``E = (A + S)/T`` the whole
  network's event rate, and every step costs all ``N`` cells: cell-steps
  ``N T (g0 + E)``, which grows as ``N^2``.

Work (right-hand sides, Newton iterations and Jacobians) is cell-steps times the
setting's measured work per cell-step; CPU seconds (one thread) are cell-steps
times the setting's measured CPU seconds per cell-step in the profile (event
handling included), and the setting with the least predicted CPU seconds is
recommended; memory is itemised: the network's
(:func:`spikegauge.scenario.estimate_memory_bytes`), the spikes kept (16 bytes
each) and the synaptic events in flight over the longest delay.
"""
from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import InputError
from ..runs import atomic_path
from .verdict import accuracy_margin, tied

BYTES_PER_SPIKE = 16
BYTES_PER_ARRIVAL = 56  # seven 8-byte fields per queued arrival (engine.ArrivalQueue)


def scaled_scenario(scenario, n_cells: int | None = None, duration_ms: float | None = None):
    """The scenario with every group resized by the same factor and a new duration.

    Pathways keep their parameters (``sources_per_target`` stays fixed,
    ``p_connect`` too), drives their per-cell rates.
    """
    groups = scenario.groups
    if n_cells is not None:
        if int(n_cells) < len(groups):
            raise InputError(f"--cells: need at least one cell per group ({len(groups)}), got {n_cells}")
        f = int(n_cells) / scenario.n_cells
        groups = tuple(dataclasses.replace(g, size=max(1, int(round(g.size * f)))) for g in groups)
    dur = scenario.duration_ms if duration_ms is None else float(duration_ms)
    # a drive that ran to the end of the scenario runs to the end of the longer run
    drives = tuple(dataclasses.replace(d, stop_ms=max(d.stop_ms, dur))
                   if d.stop_ms >= scenario.duration_ms else d for d in scenario.drives)
    return dataclasses.replace(scenario, groups=groups, duration_ms=dur, drives=drives)


def _synapses_per_cell(scenario) -> float:
    return scenario.expected_synapses() / scenario.n_cells


def _step_rate_fit(point_dir: Path, run_spikes: pd.DataFrame, t_ms: float, a: float):
    """Fit steps per cell and ms minus arrivals per cell and ms against firing rate (per ms)."""
    path = point_dir / "steps.csv"
    if not path.is_file():
        return None
    steps = pd.read_csv(path)
    steps = steps[steps["accepted"].astype(bool)]
    cells = np.unique(steps["cell"].to_numpy())
    if cells.size < 3:
        return None
    per_cell = steps.groupby("cell").size().reindex(cells).to_numpy() / t_ms - a
    rate = run_spikes["cell"].value_counts().reindex(cells, fill_value=0).to_numpy() / t_ms
    if np.ptp(rate) == 0:
        return dict(c0=float(per_cell.mean()), c1=0.0, cells=int(cells.size))
    fit = stats.linregress(rate, per_cell)
    return dict(c0=float(fit.intercept), c1=float(fit.slope), cells=int(cells.size))


def cost_model(row: pd.Series, table: pd.DataFrame, scenario, profile_dir) -> dict:
    """The cost model of one setting (see the module docstring) from its sweep row."""
    from ..network import build_network

    n0, t0 = scenario.n_cells, float(row["t_reached_ms"])
    spikes, arrivals, steps = float(row["spikes"]), float(row["arrivals"]), float(row["steps"])
    k0 = _synapses_per_cell(scenario)
    net = build_network(dataclasses.replace(scenario, seed=int(row["seed"])))
    k_actual = net.n_synapses / n0
    nu = spikes / (n0 * t0)
    a0 = arrivals / (n0 * t0)
    drive = max(a0 - nu * k_actual, 0.0)
    model = dict(strategy=row["strategy"], firing_rate_per_ms=nu, drive_per_cell_ms=drive,
                 synapses_per_cell=k0, work_per_cell_step=float(row["work"]) / steps,
                 rhs_per_cell_step=float(row["rhs_evals"]) / steps)
    if row["strategy"] == "fixed":
        model["beta_steps_per_arrival"] = (steps / (n0 * t0) - 1.0 / float(row["dt_ms"])) / a0 if a0 > 0 else 0.0
        model["dt_ms"] = float(row["dt_ms"])
    elif row["strategy"] == "local-adaptive":
        from ..runs import load_run

        point = Path(profile_dir) / "points" / row["digest"]
        fit = _step_rate_fit(point, load_run(point).spikes, t0, a0)
        if fit is None:  # no step trace: the mean over all cells stands in
            fit = dict(c0=steps / (n0 * t0) - a0, c1=0.0, cells=0)
        model.update(step_fit=fit)
    else:
        e0 = (arrivals + spikes) / t0
        model["g0_steps_per_ms"] = steps / (n0 * t0) - e0
    # the setting's own CPU seconds per cell-step (event handling included) on this machine
    model["cpu_per_cell_step_s"] = float(row["cpu_s"]) / steps
    return model


def predict(model: dict, scenario, n_cells: int, duration_ms: float) -> dict:
    """Predicted counts, wall seconds and memory for a run of ``n_cells`` over ``duration_ms``."""
    from ..scenario import estimate_memory_bytes

    big = scaled_scenario(scenario, n_cells, duration_ms)
    n, t = big.n_cells, float(duration_ms)
    nu = model["firing_rate_per_ms"]
    k = _synapses_per_cell(big)
    a = model["drive_per_cell_ms"] + nu * k
    arrivals = n * t * a
    spikes = n * t * nu
    s = model["strategy"]
    if s == "fixed":
        per_cell_ms = 1.0 / model["dt_ms"] + model["beta_steps_per_arrival"] * a
    elif s == "local-adaptive":
        fit = model["step_fit"]
        per_cell_ms = a + fit["c0"] + fit["c1"] * nu
    else:
        per_cell_ms = model["g0_steps_per_ms"] + (arrivals + spikes) / t
    steps = n * t * per_cell_ms
    max_delay = max((p.delay_ms.high if hasattr(p.delay_ms, "high") else 0.0) for p in big.pathways) \
        if big.pathways else 0.0
    memory = dict(network_bytes=float(estimate_memory_bytes(big)), spikes_bytes=BYTES_PER_SPIKE * spikes,
                  events_in_flight_bytes=BYTES_PER_ARRIVAL * a * n * max(max_delay, 1.0))
    return dict(n_cells=n, duration_ms=t, steps=steps, arrivals=arrivals, spikes=spikes,
                work=steps * model["work_per_cell_step"],
                cpu_s=model["cpu_per_cell_step_s"] * steps,
                memory=memory, memory_bytes=float(sum(memory.values())))


def advise(profile_dir, target_jitter_ms: float | None = None, target_mismatch_frac: float | None = None,
           duration_s: float | None = None, n_cells: int | None = None) -> dict:
    """Recommend a setting for a production run and write ``advice.json``.

    Among the settings that met the target in every seed of the profile (the
    profile's own target unless given), the one with the least predicted CPU
    seconds for the production run is chosen (the cheapest in the sweep need
    not be: global adaptive grows as N^2), with the verdict's tie rule (within
    10 %, the most accuracy margin); the alternatives listed are the next
    cheapest by the same prediction. Memory beyond what the machine has
    available is a warning with what to do about it.
    """
    from .results import load_results

    table, doc = load_results(profile_dir)
    target_jitter_ms = doc["target"]["jitter_ms"] if target_jitter_ms is None else target_jitter_ms
    target_mismatch_frac = doc["target"]["mismatch_frac"] if target_mismatch_frac is None \
        else target_mismatch_frac
    duration_s = doc["scenario"]["duration_ms"] / 1000.0 if duration_s is None else duration_s
    for name, v in (("--target-jitter-ms", target_jitter_ms), ("--duration-s", duration_s)):
        if not (v > 0 and math.isfinite(v)):
            raise InputError(f"{name}: must be a positive number, got {v}")
    if not 0 <= target_mismatch_frac < math.inf:
        raise InputError(f"--target-mismatch-frac: must be a number >= 0, got {target_mismatch_frac}")
    scen_path = doc["scenario"]["path"]
    scenario = _profile_scenario(profile_dir, doc)
    n = scenario.n_cells if n_cells is None else int(n_cells)
    meets = ((table["status"] == "ok") & (table["target_mismatch_fraction"] <= target_mismatch_frac)
             & (table["target_shift_rms_ms"] <= target_jitter_ms) & table["cpu_s"].notna())
    if "open_loop_shift_rms_ms" in table:  # the per-spike target holds open loop too
        meets &= ((table["open_loop_mismatch_fraction"] <= target_mismatch_frac)
                  & (table["open_loop_shift_rms_ms"] <= target_jitter_ms))
    table = table.assign(meets=meets)
    held = table.groupby("label")["meets"].all()
    first = table[table["seed"] == doc["seeds"][0]]
    candidates = first[first["label"].map(held)]
    if not len(candidates):
        raise InputError(f"{profile_dir}: no setting of the profile meets RMS jitter <= {target_jitter_ms:g} ms "
                         f"and mismatch <= {target_mismatch_frac:g} in every seed; profile a finer sweep")
    options = []
    for _, row in candidates.iterrows():
        model = cost_model(row, table, scenario, profile_dir)
        options.append((predict(model, scenario, n, duration_s * 1000.0), model, row))
    options.sort(key=lambda o: (o[0]["cpu_s"], int(o[2]["point"])))
    # the verdict's tie rule: among predictions within TIE_FRACTION of the cheapest, the
    # setting with the most accuracy margin
    ties = [o for o in options if tied(o[0]["cpu_s"], options[0][0]["cpu_s"])]
    best = max(ties, key=lambda o: (accuracy_margin(o[2], target_jitter_ms, target_mismatch_frac),
                                    -o[0]["cpu_s"], -int(o[2]["point"])))
    options.remove(best)
    options.insert(0, best)
    pred, model, row = best
    setting = {k: (None if pd.isna(row[k]) else row[k]) for k in ("strategy", "stepper", "dt_ms", "crossing",
                                                                  "delivery", "rtol", "atol")}
    available = available_memory_bytes()
    warning = memory_warning(pred["memory"], available)
    advice = dict(target=dict(jitter_ms=target_jitter_ms, mismatch_frac=target_mismatch_frac),
                  run=dict(duration_s=duration_s, n_cells=pred["n_cells"]), scenario_path=scen_path,
                  setting={k: v for k, v in setting.items() if v is not None}, label=row["label"],
                  sweep_point=int(row["point"]),
                  sweep_accuracy=dict(shift_rms_ms=float(row["target_shift_rms_ms"]),
                                      mismatch_fraction=float(row["target_mismatch_fraction"])),
                  predicted=pred, cost_model=model, available_memory_bytes=available, memory_warning=warning,
                  alternatives=[dict(label=r["label"], work=p["work"], cpu_s=p["cpu_s"])
                                for p, _, r in options[1:6]])
    from ..analysis.comparison import jsonable

    with atomic_path(Path(profile_dir) / "advice.json") as tmp:
        Path(tmp).write_text(json.dumps(jsonable(advice), indent=1, allow_nan=False))
    return jsonable(advice)


def available_memory_bytes() -> float | None:
    """Memory the machine has available now (bytes), from /proc/meminfo; None where unknown."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        pass
    return None


def memory_warning(memory: dict, available: float | None) -> str:
    """A warning with advice when the predicted memory exceeds what is available ("" otherwise)."""
    total = sum(memory.values())
    if available is None or total <= available:
        return ""
    biggest = max(memory, key=memory.get)
    advice = {"spikes_bytes": "write the spikes out in pieces as the run goes, or keep fewer cells' spikes",
              "network_bytes": "use fewer cells or synapses, or a machine with more memory",
              "events_in_flight_bytes": "shorten the longest delay or lower the event rate"}[biggest]
    return (f"the run needs about {format_bytes(total)} but this machine has {format_bytes(available)} "
            f"available; the largest part is {biggest.replace('_bytes', '').replace('_', ' ')} "
            f"({format_bytes(memory[biggest])}): {advice}")


def format_bytes(n: float) -> str:
    """Bytes in the largest fitting unit (kB, MB, GB, TB; powers of 1000)."""
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n:.0f} bytes"


def format_duration(seconds: float) -> str:
    """Seconds in the largest fitting unit: s, min, h or days."""
    for unit, size in (("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds:.3g} s"


def _profile_scenario(profile_dir, doc):
    """The profile's scenario, read back from the reference run it stored."""
    from ..scenario import parse_scenario
    from ..runs import load_run

    digest = doc["references"][0]["digests"][-1]
    run = load_run(Path(profile_dir) / "points" / digest)
    text = run.meta.get("scenario_text")
    if text is None:
        raise InputError(f"{profile_dir}: the stored reference does not hold the scenario text")
    return parse_scenario(text, source=doc["scenario"]["path"])
