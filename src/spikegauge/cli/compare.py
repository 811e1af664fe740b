"""``spikegauge compare``: compare test rasters with a reference raster."""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import click

from ..errors import InputError
from .main import cli

_TABLE = (("matched", "matched", "{:d}"), ("missed", "missed", "{:d}"), ("extra", "extra", "{:d}"),
          ("(missed+extra)/ref", "mismatch_fraction", "{:.2%}"), ("bias ms", "shift_mean_ms", "{:.3g}"),
          ("rms ms", "shift_rms_ms", "{:.3g}"), ("p99 ms", "shift_p99_abs_ms", "{:.3g}"),
          ("first err ms", "first_error_ms", "{:.4g}"), ("horizon ms", "horizon_ms", "{:.4g}"),
          ("vR", "van_rossum_mean", "{:.3g}"), ("Γ", "coincidence_factor_mean", "{:.3f}"))


def _read_costs(path: str, names: list[str]) -> dict:
    """Costs per test from a JSON object or a two-column text file (name, cost; header optional)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read ({exc})") from None
    if p.suffix.lower() == ".json":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(f"{p}: line {exc.lineno}: not valid JSON ({exc.msg})") from None
        if not isinstance(data, dict):
            raise InputError(f"{p}: expected an object {{test name: cost}}")
        rows = [(str(k), v, "key " + str(k)) for k, v in data.items()]
    else:
        rows = []
        for no, line in enumerate(text.splitlines(), start=1):
            if not line.strip():
                continue
            fields = [f.strip() for f in line.replace(";", ",").split(",")] if ("," in line or ";" in line) \
                else line.split()
            if len(fields) != 2:
                raise InputError(f"{p}: line {no}: expected 2 columns (test name, cost), found {len(fields)}")
            rows.append((fields[0], fields[1], f"line {no}"))
    costs = {}
    for k, (name, value, where) in enumerate(rows):
        try:
            costs[name] = float(value)
        except (TypeError, ValueError):
            if k == 0 and where.startswith("line"):
                continue  # header
            raise InputError(f"{p}: {where}: cost {value!r} is not a number") from None
    unknown = set(costs) - set(names)
    if unknown:
        raise InputError(f"{p}: costs for unknown test(s) {', '.join(sorted(unknown))}; "
                         f"tests are named {', '.join(names)}")
    return costs


def _population(values: tuple[str, ...]):
    """--population values: None, one name, or {name: first cell} (a name alone starts at cell 0)."""
    if not values:
        return None
    if len(values) == 1 and ":" not in values[0]:
        return values[0]
    out = {}
    for v in values:
        name, sep, first = v.rpartition(":") if ":" in v else (v, "", "0")
        try:
            cell = int(first)
        except ValueError:
            cell = -1
        if not name or cell < 0:
            raise InputError(f"--population {v!r}: expected NAME or NAME:FIRST_CELL with FIRST_CELL >= 0")
        if name in out:
            raise InputError(f"--population {name!r} given twice")
        out[name] = cell
    return out


def _names(paths: tuple[str, ...]) -> list[str]:
    """Short names of the tests: file or folder names, or the paths where those repeat."""
    stems = [Path(p).name if Path(p).is_dir() else Path(p).stem for p in paths]
    return stems if len(set(stems)) == len(stems) else [str(p) for p in paths]


@cli.command()
@click.argument("reference", type=click.Path(exists=True))
@click.argument("tests", nargs=-1, required=True, type=click.Path(exists=True))
@click.option("--match-window-ms", default=2.0, show_default=True, type=float,
              help="Largest |shift| of a matched pair (ms).")
@click.option("--tau-ms", default=5.0, show_default=True, type=float, help="van Rossum time constant (ms).")
@click.option("--cost-per-ms", type=float, help="Victor–Purpura cost of a 1 ms move (default 2 / match window).")
@click.option("--coincidence-window-ms", default=2.0, show_default=True, type=float,
              help="Window of the coincidence factor (ms).")
@click.option("--horizon-window-ms", default=50.0, show_default=True, type=float,
              help="Sliding window of agreement over time (ms).")
@click.option("--jitter-limit-ms", type=float, help="RMS jitter beyond which a window counts as diverged.")
@click.option("--costs", "costs_file", type=click.Path(exists=True, dir_okay=False),
              help="Cost of each test: JSON {name: cost} or CSV name,cost (names: file stems).")
@click.option("--t-start-ms", type=float, help="Start of the compared interval (skips a transient).")
@click.option("--t-stop-ms", type=float, help="End of the compared interval (ms).")
@click.option("--cells", "n_cells", type=int, help="Cell count, for files that do not carry one.")
@click.option("--time-unit", type=click.Choice(["ms", "s"]), default="ms", show_default=True,
              help="Unit of the times in text files.")
@click.option("--population", "populations", multiple=True, metavar="NAME[:FIRST_CELL]",
              help="SONATA spike files: read this population (repeatable); with :FIRST_CELL its node id n "
                   "is cell FIRST_CELL + n. Default: every population, node ids kept.")
@click.option("--unit-id-column", help="NWB files: units-table column giving each unit's cell id "
                                       "('id' for the row ids). Default: table order.")
@click.option("--no-figures", is_flag=True, help="Do not draw the PNG figures.")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False), help="Folder to write.")
def compare(reference, tests, match_window_ms, tau_ms, cost_per_ms, coincidence_window_ms,
            horizon_window_ms, jitter_limit_ms, costs_file, t_start_ms, t_stop_ms, n_cells, time_unit,
            populations, unit_id_column, no_figures, out_dir):
    """Compare the TEST rasters with the REFERENCE raster.

    Rasters are run folders, NPZ files, two-column text files (cell, time),
    SONATA spike files or NWB files (the units table), told apart by content.
    Writes comparison.json, per_cell.csv, pairs.csv and figures/*.png to --out.
    """
    import pandas as pd

    from ..analysis import compare_many

    names = _names(tests)
    costs = _read_costs(costs_file, names) if costs_file else None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = compare_many(
            reference, dict(zip(names, tests)), costs=costs, match_window_ms=match_window_ms,
            tau_ms=tau_ms, cost_per_ms=cost_per_ms, coincidence_window_ms=coincidence_window_ms,
            horizon_window_ms=horizon_window_ms, jitter_limit_ms=jitter_limit_ms, n_cells=n_cells,
            t_start_ms=t_start_ms, t_stop_ms=t_stop_ms, time_unit=time_unit,
            population=_population(populations), unit_id_column=unit_id_column)
    for w in dict.fromkeys(str(w.message) for w in caught):
        click.echo(f"warning: {w}", err=True)
    first = next(iter(result.comparisons.values()))
    for label, raster in (("reference", first.reference),
                          *((n, c.test) for n, c in result.comparisons.items())):
        if raster.n_duplicates:
            click.echo(f"warning: {label} ({raster.source}) has {raster.n_duplicates} duplicate "
                       "spike(s) (same cell and time); they are kept", err=True)

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    result.to_json(out / "comparison.json")
    pd.concat([c.per_cell.assign(test=n) for n, c in result.comparisons.items()]) \
        .to_csv(out / "per_cell.csv", index=False)
    pd.concat([c.pairs.assign(test=n) for n, c in result.comparisons.items()]) \
        .to_csv(out / "pairs.csv", index=False)
    shown = []
    if not no_figures:
        from ..report.raster_plots import raster_difference_view, write_figures, write_front
        several = len(result.comparisons) > 1
        for n, c in result.comparisons.items():
            prefix = f"{n}_" if several else ""
            write_figures(c, out / "figures", prefix=prefix)
            shown.append(f"figures/{prefix}raster_difference.png shows {raster_difference_view(c).description}")
        if result.front is not None:
            write_front(result, out / "figures")

    s = first.summary
    click.echo(f"reference {reference}: {s['n_ref']} spikes, {s['n_cells']} cells, "
               f"{s['t_start_ms']:g}-{s['t_stop_ms']:g} ms")
    columns = ["test", *(h for h, _, _ in _TABLE)] + (["cost", "front"] if costs is not None else [])
    rows = []
    for n, c in result.comparisons.items():
        row = [n] + [_fmt(fmt, c.summary[key]) for _, key, fmt in _TABLE]
        if costs is not None:
            row += [_fmt("{:.4g}", result.table.loc[n, "cost"]), "*" if result.table.loc[n, "on_front"] else ""]
        rows.append(row)
    widths = [max(len(str(x)) for x in col) for col in zip(columns, *rows)]
    for row in (columns, *rows):
        click.echo("  ".join(str(x).rjust(w) for x, w in zip(row, widths)))
    click.echo(_legend(first.settings))
    for line in shown:
        click.echo(line)
    click.echo(f"written to {out}")


def _legend(settings: dict) -> str:
    """What the table's columns mean, under the table."""
    return "\n".join([
        "(missed+extra)/ref: missed plus extra spikes per reference spike",
        "bias, rms, p99 ms: signed mean, RMS and 99th percentile of |shift| of matched spikes (test - reference)",
        "first err ms: time to the first missed or extra spike; horizon ms: time until agreement is lost",
        f"vR: van Rossum distance (tau {settings['tau_ms']:g} ms), mean over cells (0 = identical)",
        f"Γ: coincidence factor (window {settings['coincidence_window_ms']:g} ms), mean over cells "
        "(1 = identical, 0 = chance level)"])


def _fmt(fmt: str, value) -> str:
    try:
        if value != value:  # NaN
            return "-"
        return fmt.format(value)
    except (TypeError, ValueError):
        return str(value)
