"""``spikegauge profile``: reference, sensitivity ladder and sweep of one scenario."""
from __future__ import annotations

import warnings

import click

from .main import cli


class _Bar:
    """Adapts the profile's progress calls to a click progress bar on a terminal, and to one
    plain line per finished run ("12/76 fixed rk4 dt=0.05 hermite/exact") elsewhere (a log
    file, a batch job's output)."""

    def __init__(self, quiet: bool):
        self.quiet = quiet
        self.bar = None
        self.stream = click.get_text_stream("stderr")
        self.lines = not self.stream.isatty()
        self.done = 0
        self.length = 0

    def total(self, n: int):
        self.length = n
        if self.quiet or self.lines:
            return
        if self.bar is None:
            self.bar = click.progressbar(length=n, label="runs", show_eta=True, show_pos=True,
                                         item_show_func=lambda item: item, file=self.stream)
            self.bar.__enter__()
        else:
            self.bar.length = n

    def step(self, label: str):
        self.done += 1
        if self.bar is not None:
            self.bar.update(1, current_item=label)
        elif self.lines and not self.quiet:
            click.echo(f"{self.done}/{self.length} {label}", file=self.stream)

    def close(self):
        if self.bar is not None:
            self.bar.__exit__(None, None, None)
            self.bar = None


@cli.command()
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Profile folder (results.csv, profile.json, points/).")
@click.option("--sweep", "sweep_file", type=click.Path(dir_okay=False),
              help="Sweep file with a [sweep] table (overrides the scenario's and the default).")
@click.option("--quick", is_flag=True, help="A small sweep (8 points) for smoke tests.")
@click.option("--seeds", default=1, show_default=True, type=int,
              help="Network and drive realisations (seeds seed, seed+1, ...).")
@click.option("--jobs", type=int,
              help="Local worker processes, each running one point at a time on one thread "
                   "[default: one per core; 1 runs everything in this process].")
@click.option("--scheduler", help="Dask scheduler address (runs the points on that cluster).")
@click.option("--target-jitter-ms", default=0.1, show_default=True, type=float,
              help="Accuracy target: RMS spike-time jitter (ms).")
@click.option("--target-mismatch-frac", default=0.01, show_default=True, type=float,
              help="Accuracy target: missed + extra spikes as a fraction of the reference's.")
@click.option("--work-limit-factor", default=10.0, show_default=True, type=float,
              help="Stop a run once its work passes this many times that of the cheapest point of an "
                   "earlier round that met the target (comparable strategies); above 1.")
@click.option("--fresh", is_flag=True, help="Recompute points already stored.")
@click.option("--sonata", "write_sonata", is_flag=True,
              help="Also write every stored point's raster (reference runs included) as points/*/spikes.h5.")
@click.option("--quiet", is_flag=True, help="No progress display.")
def profile(scenario, out_dir, sweep_file, quick, seeds, jobs, scheduler, target_jitter_ms,
            target_mismatch_frac, work_limit_factor, fresh, write_sonata, quiet):
    """Run the reference, the sensitivity ladder and the sweep of SCENARIO; write the profile and its report."""
    from ..profile import run_profile
    from ..profile.store import DamagedPointWarning
    from ..profile.summary import profile_text

    bar = _Bar(quiet)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DamagedPointWarning)
            doc = run_profile(scenario, out_dir, sweep_file=sweep_file, quick=quick, seeds=seeds,
                              jobs=jobs, scheduler=scheduler, target_jitter_ms=target_jitter_ms,
                              target_mismatch_frac=target_mismatch_frac, fresh=fresh, progress=bar,
                              work_limit_factor=work_limit_factor)
        bar.close()
        for message in dict.fromkeys(str(w.message) for w in caught):
            click.echo(f"warning: {message}", err=True)
    except KeyboardInterrupt:
        bar.close()
        stored = _stored_points(out_dir)
        click.echo(f"interrupted: {stored} finished runs are stored in {out_dir}; run the same "
                   "command again to resume (finished runs are not recomputed)", err=True)
        raise SystemExit(130) from None
    finally:
        bar.close()
    click.echo(profile_text(doc))
    if write_sonata:
        from ..formats import write_profile_sonata
        written = write_profile_sonata(out_dir)
        click.echo(f"SONATA spike files: {len(written)} written as {out_dir}/points/*/spikes.h5")
    from ..report.report import build_report
    paths = build_report(out_dir)
    click.echo(f"report: {out_dir}/report.html ({len(paths)} files; `spikegauge report {out_dir}` "
               "rebuilds it from the stored results)")


def _stored_points(out_dir) -> int:
    """Runs whose files are complete in the profile's store."""
    from pathlib import Path
    return sum(1 for d in (Path(out_dir) / "points").glob("*") if (d / "run.json").is_file())
