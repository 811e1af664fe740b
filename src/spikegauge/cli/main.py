"""The click group and the central error handling of the command line."""
from __future__ import annotations

import sys

import click

from ..errors import ComputationError, InputError


class _Group(click.Group):
    """A click group that turns our errors into one line and an exit status.

    Input errors exit with 2 (like click's own usage errors), failed
    computations with 1. ``--debug`` lets the traceback through.
    """

    def invoke(self, ctx):
        debug = ctx.params.get("debug", False) or "--debug" in sys.argv
        try:
            return super().invoke(ctx)
        except InputError as exc:
            if debug:
                raise
            click.echo(f"error: {_one_line(exc)}", err=True)
            ctx.exit(2)
        except ComputationError as exc:
            if debug:
                raise
            click.echo(f"failed: {_one_line(exc)}", err=True)
            ctx.exit(1)
        except (click.exceptions.ClickException, click.exceptions.Exit, click.exceptions.Abort,
                KeyboardInterrupt, SystemExit):
            raise
        except Exception as exc:  # a bug of ours: one line, the traceback only with --debug
            if debug:
                raise
            click.echo(f"internal error: {type(exc).__name__}: {_one_line(exc)} "
                       "(this is a bug; run with --debug for the traceback)", err=True)
            ctx.exit(1)


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


@click.group(cls=_Group)
@click.option("--debug", is_flag=True, help="Show full tracebacks.")
@click.version_option(package_name="spikegauge")
def cli(debug):
    """Measure the spike-timing error and cost of integration settings for a network of point neurons."""


def progress_bar(length: int, label: str, quiet: bool):
    """Click's progress bar on stderr, or a silent stand-in with ``--quiet``."""
    if quiet:
        return _SilentBar()
    return click.progressbar(length=length, label=label, show_eta=True,
                             file=click.get_text_stream("stderr"))


class _SilentBar:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def update(self, n_steps, current_item=None):
        pass
