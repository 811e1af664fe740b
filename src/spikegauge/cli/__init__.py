"""Command line: ``spikegauge COMMAND``. Each command lives in its own module."""
from .main import cli
from . import check, compare, simulate  # noqa: F401  (each import registers its command)


def main():
    cli()
