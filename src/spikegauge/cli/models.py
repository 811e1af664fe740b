"""``spikegauge models``: the built-in models and their scenario keys."""
from __future__ import annotations

import click

from .main import cli


@cli.command()
@click.argument("name", required=False)
def models(name):
    """List the built-in models, or show the keys of model NAME (a built-in name or a model file, .toml).

    With NAME: its equations, its states ([group.initial] keys) with units, resting values
    and scales, its parameters ([group.parameters] keys) with defaults, units
    and descriptions, its weight and current keys, and its published source.
    """
    from ..catalog import UNIT_SYSTEMS, describe_model, model_table

    if name is None:
        table = model_table()
        click.echo(_table(table[["name", "unit_system", "description"]].rename(columns={"unit_system": "units"})))
        click.echo("units: " + "; ".join(f"{k} = {v}" for k, v in UNIT_SYSTEMS.items()))
        click.echo("`spikegauge models NAME` shows a model's keys; `spikegauge models FILE.toml` a model file's. "
                   "A scenario uses a model file with model = \"FILE.toml\" (relative to the scenario).")
        return
    info = describe_model(name)
    click.echo(f"{info.name}: {info.description}")
    click.echo(f"source: {info.source}")
    click.echo(f"units: {info.unit_system} ({UNIT_SYSTEMS[info.unit_system]})")
    if info.equations:
        click.echo("")
        click.echo("equations:")
        for line in info.equations:
            click.echo(f"  {line}")
    click.echo("")
    click.echo("states ([group.initial]; initial = where a cell starts when the scenario does not say: "
               "a built-in model's resting state at the default parameters, a model file's own initial "
               "values; scale = typical magnitude):")
    click.echo(_table(info.states[["key", "unit", "initial", "scale"]], indent="  "))
    click.echo("")
    click.echo("parameters ([group.parameters]; fixed ones may not be set):")
    params = info.parameters.assign(default=[
        ("fixed " if f else "") + f"{d:.6g}" for d, f in zip(info.parameters["default"], info.parameters["fixed"])])
    click.echo(_table(params[["key", "unit", "default", "description"]], indent="  "))
    click.echo("")
    click.echo(f"weight key ([[pathway]], [[drive]]): {info.weight_key}")
    click.echo(f"current key ([[drive]] kinds bias and step): {info.current_key}")


def _table(frame, indent: str = "") -> str:
    """Left-aligned columns, numbers to six significant digits."""
    cells = [[f"{v:.6g}" if isinstance(v, float) else str(v) for v in row] for row in frame.itertuples(index=False)]
    rows = [list(frame.columns)] + cells
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join(indent + "  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)
