"""``spikegauge report``: rebuild a profile's report from its stored results."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.argument("profile_dir", type=click.Path(file_okay=False))
def report(profile_dir):
    """Write report.html, report.md and figures/*.png into PROFILE_DIR (nothing is rerun)."""
    from ..report.report import build_report

    paths = build_report(profile_dir)
    click.echo(f"wrote {len(paths)} files; open {profile_dir}/report.html in a browser")
