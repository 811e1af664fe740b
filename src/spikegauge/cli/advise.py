"""``spikegauge advise``: recommend a setting for a production run from a profile."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.argument("profile_dir", type=click.Path(file_okay=False))
@click.option("--target-jitter-ms", required=True, type=float, help="RMS spike-time jitter allowed (ms).")
@click.option("--target-mismatch-frac", required=True, type=float,
              help="Missed + extra spikes allowed, as a fraction of the reference's.")
@click.option("--duration-s", required=True, type=float, help="Length of the production run (s).")
@click.option("--cells", type=int, help="Cells of the production run (default: the scenario's).")
def advise(profile_dir, target_jitter_ms, target_mismatch_frac, duration_s, cells):
    """Recommend a setting for a run of that length and size; write PROFILE_DIR/advice.json."""
    from ..profile.advice import advise as make_advice

    a = make_advice(profile_dir, target_jitter_ms, target_mismatch_frac, duration_s, cells)
    p = a["predicted"]
    click.echo(f"Run: {a['label']}")
    click.echo(f"  sweep accuracy: RMS jitter {a['sweep_accuracy']['shift_rms_ms']:.3g} ms, "
               f"(missed + extra) per reference spike {a['sweep_accuracy']['mismatch_fraction']:.3%}")
    click.echo(f"  predicted for {p['n_cells']} cells over {a['run']['duration_s']:g} s: "
               f"{p['steps']:.4g} cell-steps, {p['arrivals']:.4g} synaptic events, "
               f"wall {p['wall_s']:.4g} s, memory {p['memory_bytes'] / 1e9:.3g} GB")
    click.echo(f"  written to {profile_dir}/advice.json")
