"""Command line: ``spikegauge COMMAND``. Each command lives in its own module."""
from .main import cli
from . import advise, bench, check, compare, models, profile, report, simulate  # noqa: F401  (each registers its command)


def main():
    cli()
