"""``spikegauge advise``: recommend a setting for a production run from a profile."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.argument("profile_dir", type=click.Path(file_okay=False))
@click.option("--target-jitter-ms", type=float, help="RMS spike-time jitter allowed (ms) [default: the profile's].")
@click.option("--target-mismatch-frac", type=float,
              help="Missed + extra spikes allowed, as a fraction of the reference's [default: the profile's].")
@click.option("--duration-s", type=float, help="Length of the production run (s) [default: the profile's].")
@click.option("--cells", type=int, help="Cells of the production run (default: the scenario's).")
def advise(profile_dir, target_jitter_ms, target_mismatch_frac, duration_s, cells):
    """Recommend a setting for a run of that length and size; write PROFILE_DIR/advice.json."""
    from ..profile.advice import advise as make_advice, format_bytes, format_duration

    a = make_advice(profile_dir, target_jitter_ms, target_mismatch_frac, duration_s, cells)
    p = a["predicted"]
    t = a["target"]
    click.echo(f"Run: {a['label']} (target: RMS jitter {t['jitter_ms']:g} ms, (missed + extra) per "
               f"reference spike {t['mismatch_frac']:g})")
    click.echo(f"  sweep accuracy: RMS jitter {a['sweep_accuracy']['shift_rms_ms']:.3g} ms, "
               f"(missed + extra) per reference spike {a['sweep_accuracy']['mismatch_fraction']:.3%}")
    click.echo(f"  predicted for {p['n_cells']} cells over {format_duration(a['run']['duration_s'])}: "
               f"{p['steps']:.4g} cell-steps, {p['arrivals']:.4g} synaptic events, "
               f"CPU {format_duration(p['cpu_s'])} on one thread")
    m = p["memory"]
    click.echo(f"  memory {format_bytes(p['memory_bytes'])}: network {format_bytes(m['network_bytes'])}, "
               f"spikes kept {format_bytes(m['spikes_bytes'])}, synaptic events in flight "
               f"{format_bytes(m['events_in_flight_bytes'])}")
    if a["memory_warning"]:
        click.echo(f"  warning: {a['memory_warning']}")
    for alt in a["alternatives"][:3]:
        click.echo(f"  next: {alt['label']}, CPU {format_duration(alt['cpu_s'])}")
    click.echo(f"  written to {profile_dir}/advice.json")
