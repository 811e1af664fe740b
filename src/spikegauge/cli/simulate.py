"""``spikegauge simulate``: one run of a scenario with one integration setting."""
from __future__ import annotations

import time

import click

from .main import cli, progress_bar


@cli.command()
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--strategy", type=click.Choice(["fixed", "global-adaptive", "local-adaptive", "exact"]),
              help="Integration strategy (default: the scenario's [integration] table, else fixed).")
@click.option("--stepper", help="euler, expeuler, rk2, rk4, backward-euler, trapezoidal (fixed); bs32, dp54, rodas3, bdf (adaptive).")
@click.option("--dt-ms", type=float, help="Time step of the fixed strategy (ms).")
@click.option("--crossing", type=click.Choice(["step", "linear", "hermite", "dense"]),
              help="Threshold-crossing location.")
@click.option("--delivery", type=click.Choice(["grid", "exact"]),
              help="When the fixed strategy applies a synaptic event: at the next step (grid) or exactly.")
@click.option("--rtol", type=float, help="Relative tolerance (adaptive strategies).")
@click.option("--atol", type=float, help="Absolute tolerance in units of each state's scale (adaptive).")
@click.option("--auto-scale", is_flag=True, help="Measure state scales with a short pilot run (adaptive).")
@click.option("--t-stop-ms", type=float,
              help="Stop the run at this time (ms), earlier than the scenario's duration_ms "
                   "(default: the whole duration). Drive and network are the same as for the whole run.")
@click.option("--threads", type=int,
              help="Number of threads (results do not depend on it; default: as many as help, one "
                   "below 200 cells, never more than the cores other programs leave free).")
@click.option("--open-loop", "open_loop", type=click.Path(),
              help="Open loop: replay this raster (a run folder, or an NPZ or CSV file of cell, "
                   "time_ms) as the recurrent input instead of the network's own spikes.")
@click.option("--csv", "write_csv", is_flag=True, help="Also write spikes.csv.")
@click.option("--sonata", "write_sonata", is_flag=True, help="Also write spikes.h5 (a SONATA spike file).")
@click.option("--max-memory-gb", type=float,
              help="Memory (GB) the run may use; overrides the machine's available memory.")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False), help="Run folder to write.")
@click.option("--quiet", is_flag=True, help="No progress bar.")
def simulate(scenario, strategy, stepper, dt_ms, crossing, delivery, rtol, atol, auto_scale, t_stop_ms,
             threads, open_loop, write_csv, write_sonata, max_memory_gb, out_dir, quiet):
    """Integrate SCENARIO once and write spikes.npz and run.json to --out."""
    from ..scenario import load_scenario
    from ..simulation import resolve_settings, simulate as run_simulation

    scen = load_scenario(scenario, max_memory_gb=max_memory_gb)
    options = dict(strategy=strategy, stepper=stepper, dt_ms=dt_ms, crossing=crossing,
                   delivery=delivery, rtol=rtol, atol=atol)
    resolve_settings(scen, **options)  # refuse bad options before any work
    started = time.perf_counter()
    t_stop = scen.duration_ms if t_stop_ms is None else t_stop_ms
    with progress_bar(max(1, int(round(t_stop * 1000))), "simulating", quiet) as bar:
        done = [0]

        def progress(t_ms):
            if time.perf_counter() - started < 2.0:
                return  # runs shorter than a couple of seconds get no bar
            now = int(round(t_ms * 1000))
            bar.update(now - done[0])
            done[0] = now

        run = run_simulation(scen, auto_scale=auto_scale, threads=threads, progress=progress,
                             t_stop_ms=t_stop_ms, open_loop=open_loop, **options)
    out = run.save(out_dir)
    written = ["spikes.npz", "run.json"]
    if write_csv:
        run.spikes.to_csv(out / "spikes.csv", index=False)
        written.append("spikes.csv")
    if write_sonata:
        from ..formats import write_run_sonata
        write_run_sonata(out)
        written.append("spikes.h5")
    s = run.settings
    desc = ", ".join(f"{k}={v}" for k, v in s.items() if k not in ("scale_used",))
    click.echo(f"{run.status}: {len(run.spikes)} spikes from {run.n_cells} cells over "
               f"{run.t_stop_ms - run.t_start_ms:g} ms, mean rate {run.mean_rate_hz:.3f} Hz")
    if run.message:
        click.echo(run.message)
    click.echo(f"setting: {desc}")
    replayed = run.meta.get("open_loop_raster")
    if replayed is not None:
        click.echo(f"open loop: replayed {replayed['spikes']} spikes of {replayed['source']} "
                   f"(sha256 {replayed['sha256'][:16]})")
    c = run.cost
    click.echo(f"cost: {c['steps']} cell-steps, {c['rhs_evals']} rhs evaluations, "
               f"{c['arrivals']} synaptic events, loop {c['wall_s']:.3f} s")
    click.echo(f"written: {out}/{', '.join(written)}")
