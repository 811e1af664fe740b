"""``spikegauge bench``: time the engine and the analysis (see :mod:`spikegauge.bench`)."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.option("--quick", is_flag=True, help="Short runs and small rasters: a smoke test, not a measurement.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the report.")
@click.option("--reps", type=click.IntRange(min=1), help="Repetitions per figure (default 5; 1 with --quick).")
@click.option("--profile", "profile_dir", type=click.Path(file_okay=False, exists=True),
              help="Instead: re-time every setting of this profile that met the target (best of --reps, "
                   "default 3) and check the verdict against it.")
def bench(quick, as_json, reps, profile_dir):
    """Time bench-lif, bench-hh, a single HH cell and a raster comparison (1 and 2 threads)."""
    from ..bench import format_report, run_bench, to_json

    log = None if as_json else (lambda msg: click.echo(msg, err=True))
    if profile_dir is not None:
        from ..profile.retime import format_retime, retime_profile

        res = retime_profile(profile_dir, reps=reps or 3, log=log)
        if as_json:
            res = dict(res, table=res["table"].to_dict("records"))
        click.echo(to_json(res) if as_json else format_retime(res))
        return
    res = run_bench(quick=quick, reps=reps, log=log)
    click.echo(to_json(res) if as_json else format_report(res))
