"""``spikegauge bench``: time the engine and the analysis (see :mod:`spikegauge.bench`)."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.option("--quick", is_flag=True, help="Short runs and small rasters: a smoke test, not a measurement.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of the report.")
@click.option("--reps", type=click.IntRange(min=1), help="Repetitions per figure (default 5; 1 with --quick).")
def bench(quick, as_json, reps):
    """Time bench-lif, bench-hh, a single HH cell and a raster comparison (1 and 2 threads)."""
    from ..bench import format_report, run_bench, to_json

    log = None if as_json else (lambda msg: click.echo(msg, err=True))
    res = run_bench(quick=quick, reps=reps, log=log)
    click.echo(to_json(res) if as_json else format_report(res))
