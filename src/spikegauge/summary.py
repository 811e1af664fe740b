"""What ``spikegauge check`` reports about a scenario and its built network."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .network.arrays import Network
from .scenario import RECEPTORS, Scenario, available_memory_bytes, estimate_memory_bytes


@dataclass(frozen=True)
class Summary:
    """A scenario summary as plain data (``data``) and as text for a terminal (``text``)."""

    data: dict
    text: str


def summarize(scenario: Scenario, network: Network) -> Summary:
    """Summarise a scenario and the network built from it.

    Parameters
    ----------
    scenario : Scenario
    network : Network
        ``build_network(scenario)``.

    Returns
    -------
    Summary
        ``data`` keys: ``name``, ``file``, ``duration_ms``, ``seed``,
        ``integration`` (settings the file gives), ``cells``, ``groups`` (name,
        model, size, first cell id, connections in), ``connections``,
        ``pathways`` (source, target, connect, receptor, connections),
        ``min_delay_ms`` (None without connections), ``drive_events_per_s``
        (expected drive events per second of simulated time, averaged over the
        run), ``drives`` (kind, target, events_per_s), ``memory_estimate_gb``,
        ``memory_available_gb``.
    """
    first = network.group_first
    in_degree = np.bincount(network.syn_target, minlength=network.n_cells)
    groups = [
        dict(name=g.name, model=g.model, size=g.size, first=int(first[i]),
             connections_in=int(in_degree[first[i]:first[i + 1]].sum()))
        for i, g in enumerate(scenario.groups)
    ]
    pathways = [
        dict(source=p.source, target=p.target, connect=p.connect, receptor=p.receptor,
             connections=_pathway_count(network, scenario, i))
        for i, p in enumerate(scenario.pathways)
    ]
    drives = _drive_rates(scenario, network)
    data = dict(
        name=scenario.name,
        file=str(scenario.path) if scenario.path is not None else None,
        duration_ms=scenario.duration_ms,
        seed=scenario.seed,
        integration=scenario.integration.as_dict(),
        cells=network.n_cells,
        groups=groups,
        connections=network.n_synapses,
        pathways=pathways,
        min_delay_ms=float(network.d_min_ms) if network.n_synapses else None,
        drive_events_per_s=float(sum(d["events_per_s"] for d in drives)),
        drives=drives,
        memory_estimate_gb=estimate_memory_bytes(scenario) / 1e9,
        memory_available_gb=available_memory_bytes() / 1e9,
    )
    return Summary(data, _text(data))


def _pathway_count(network: Network, scenario: Scenario, i: int) -> int | None:
    """Connections a pathway made, when they can be told apart from the others' in the network."""
    p = scenario.pathways[i]
    # Pathways sharing a (source group, target group, receptor) are merged in
    # the CSR arrays; report their expected count only if it is exact.
    twins = [q for q in scenario.pathways
             if (q.source_index, q.target_index, q.receptor) == (p.source_index, p.target_index, p.receptor)]
    if len(twins) > 1:
        return None
    first = network.group_first
    s0, s1 = first[p.source_index], first[p.source_index + 1]
    t0, t1 = first[p.target_index], first[p.target_index + 1]
    lo, hi = network.syn_ptr[s0], network.syn_ptr[s1]
    tgt = network.syn_target[lo:hi]
    rec = network.syn_receptor[lo:hi]
    return int(np.count_nonzero((tgt >= t0) & (tgt < t1) & (rec == RECEPTORS[p.receptor])))


def _drive_rates(scenario: Scenario, network: Network) -> list[dict]:
    """Expected events per second of simulated time, per drive."""
    duration_s = scenario.duration_ms / 1000.0
    by_id = {d.drive_id: d for d in network.poisson}
    source = network.events.source
    out = []
    for i, d in enumerate(scenario.drives):
        if i in by_id:
            pois = by_id[i]
            active = max(0.0, pois.stop_ms - pois.start_ms) / scenario.duration_ms
            rate = float(pois.rate_hz.sum()) * active
        else:
            rate = float(np.count_nonzero(source == -(1 + i))) / duration_s
        out.append(dict(kind=d.kind, target=d.target, events_per_s=rate))
    return out


def _text(d: dict) -> str:
    lines = [f"scenario {d['name']}" + (f" ({d['file']})" if d["file"] else ""),
             f"  duration {d['duration_ms']:g} ms, seed {d['seed']}"]
    if d["integration"]:
        lines.append("  integration: " + ", ".join(f"{k} {v}" for k, v in d["integration"].items()))
    lines.append(f"cells: {d['cells']}")
    for g in d["groups"]:
        lines.append(f"  {g['name']:<12} {g['size']:>8}  {g['model']:<16} ids {g['first']}..{g['first'] + g['size'] - 1}")
    lines.append(f"connections: {d['connections']}")
    for p in d["pathways"]:
        n = "merged" if p["connections"] is None else str(p["connections"])
        lines.append(f"  {p['source']} -> {p['target']:<10} {p['connect']:<18} {p['receptor']:<11} {n:>9}")
    lines.append("minimum delay: " + ("none (no connections)" if d["min_delay_ms"] is None
                                      else f"{d['min_delay_ms']:.6g} ms"))
    lines.append(f"drive events: {d['drive_events_per_s']:.6g} per second (expected)")
    for i, dr in enumerate(d["drives"]):
        what = "constant current" if dr["kind"] == "bias" else f"{dr['events_per_s']:.6g}/s"
        lines.append(f"  drive[{i}] {dr['kind']:<8} -> {dr['target']:<10} {what}")
    lines.append(f"estimated memory: {_size(d['memory_estimate_gb'])} "
                 f"(available: {_size(d['memory_available_gb'])})")
    return "\n".join(lines)


def _size(gb: float) -> str:
    return f"{gb:.2f} GB" if gb >= 1 else f"{gb * 1000:.1f} MB"
