"""``spikegauge check``: validate a scenario file and summarise its network."""
from __future__ import annotations

import json

import click

from .main import cli


@cli.command()
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--max-memory-gb", type=float,
              help="Memory (GB) the network may use; overrides the machine's available memory "
                   "and the scenario's max_memory_gb.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
def check(scenario, max_memory_gb, as_json):
    """Validate SCENARIO, build its network and print a summary.

    The summary gives cells per group, connections per pathway, the minimum
    delay, the expected drive events per second and the estimated memory.
    """
    from ..network import build_network
    from ..scenario import load_scenario
    from ..summary import summarize

    scen = load_scenario(scenario, max_memory_gb=max_memory_gb)
    summary = summarize(scen, build_network(scen))
    click.echo(json.dumps(summary.data, indent=2) if as_json else summary.text)
