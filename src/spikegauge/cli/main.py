"""The click group and the central error handling of the command line.

Exit statuses: 0 done; 1 a failed computation or a bug of ours (one line);
2 bad input (one line); 130 interrupted (Ctrl-C); 141 the reader of our
standard output or error went away (``spikegauge simulate ... | head -1``).
"""
from __future__ import annotations

import contextlib
import os
import select
import sys

import click

from ..errors import ComputationError, InputError


class _Group(click.Group):
    """A click group that turns our errors into one line and an exit status.

    Input errors exit with 2 (like click's own usage errors), failed
    computations with 1. ``--debug`` lets the traceback through. A closed
    standard output or error ends the program quietly with
    :data:`CLOSED_PIPE_STATUS`, wherever the write happened: in a command, in
    click's help or usage text, or in one of our own error lines.
    """

    def main(self, *args, **kwargs):
        with _quiet_if_closed():  # click's usage-error text, shown after invoke
            return super().main(*args, **kwargs)

    def make_context(self, *args, **kwargs):
        with _quiet_if_closed():  # --help and --version write while parsing
            return super().make_context(*args, **kwargs)

    def invoke(self, ctx):
        with _quiet_if_closed():  # the error lines below, written to a closed stderr
            return self._invoke(ctx)

    def _invoke(self, ctx):
        debug = ctx.params.get("debug", False) or "--debug" in sys.argv
        try:
            result = super().invoke(ctx)
            sys.stdout.flush()  # a reader gone while we still held output shows here, not at exit
            return result
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
            if isinstance(exc, BrokenPipeError) and _closed_standard_stream():
                _quit_on_closed_pipe()
            if debug:
                raise
            click.echo(f"internal error: {type(exc).__name__}: {_one_line(exc)} "
                       "(this is a bug; run with --debug for the traceback)", err=True)
            ctx.exit(1)


CLOSED_PIPE_STATUS = 141
"""Exit status when standard output or error is closed under us: 128 + SIGPIPE (13), what a
shell reports for ``yes | head -1``'s writer, so pipelines and ``set -o pipefail`` read it as
"the reader stopped", not as a failure of ours."""


def _closed_standard_stream() -> bool:
    """Whether our stdout or stderr is a pipe or socket whose reader has gone.

    A write end whose reader has closed polls as an error (POLLERR/POLLHUP) on
    Linux and the BSDs; where ``poll`` is missing we trust the BrokenPipeError.
    """
    if not hasattr(select, "poll"):
        return True
    for stream in (sys.__stdout__, sys.__stderr__):
        try:
            fd = stream.fileno()
        except (AttributeError, OSError, ValueError):
            continue
        poller = select.poll()
        poller.register(fd, select.POLLOUT)
        if any(ev & (select.POLLERR | select.POLLHUP) for _, ev in poller.poll(0)):
            return True
    return False


@contextlib.contextmanager
def _quiet_if_closed():
    """Turn a BrokenPipeError on our stdout or stderr into :func:`_quit_on_closed_pipe`."""
    try:
        yield
    except BrokenPipeError:
        if _closed_standard_stream():
            _quit_on_closed_pipe()
        raise


def _quit_on_closed_pipe():
    """End quietly with :data:`CLOSED_PIPE_STATUS` once stdout or stderr lost its reader.

    Both streams are pointed at the null device first, so output still buffered
    (or a message written while unwinding) goes nowhere instead of raising again at
    exit. Files already written stay: the commands write them atomically before
    printing. Python ignores SIGPIPE, so the write raised BrokenPipeError instead
    of killing us; restoring the default handler instead would also kill a run
    between a temporary file and its rename.
    """
    devnull = os.open(os.devnull, os.O_WRONLY)
    for stream in (sys.__stdout__, sys.__stderr__):
        try:
            os.dup2(devnull, stream.fileno())
        except (AttributeError, OSError, ValueError):
            pass
    os.close(devnull)
    raise SystemExit(CLOSED_PIPE_STATUS)


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
