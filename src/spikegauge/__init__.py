"""spikegauge: what an integration setting costs in spike-timing error, measured.

Public names::

    load_scenario(path) -> Scenario
    build_network(scenario) -> Network
    simulate(scenario, strategy=..., ...) -> Run
    load_run(directory) -> Run
"""
__version__ = "0.1.0"

from .errors import ComputationError, InputError, SpikegaugeError  # noqa: E402
from .runs import Run, load_run  # noqa: E402
from .simulation import simulate  # noqa: E402

__all__ = ["__version__", "ComputationError", "InputError", "SpikegaugeError", "Run", "load_run",
           "simulate"]
