"""spikegauge: what an integration setting costs in spike-timing error, measured.

Public names::

    load_scenario(path) -> Scenario
    build_network(scenario) -> Network
    simulate(scenario, strategy=..., ..., open_loop=None) -> Run
    load_run(directory) -> Run
    compare(reference, test, ...) -> Comparison
    compare_many(reference, {name: test}, costs=None) -> ComparisonSet
"""
__version__ = "0.1.0"

from .analysis import Comparison, compare, compare_many  # noqa: E402
from .errors import ComputationError, InputError, SpikegaugeError  # noqa: E402
from .network import build_network  # noqa: E402
from .runs import Run, load_run  # noqa: E402
from .scenario import load_scenario  # noqa: E402
from .simulation import simulate  # noqa: E402

__all__ = ["__version__", "Comparison", "ComputationError", "InputError", "Run", "SpikegaugeError",
           "build_network", "compare", "compare_many", "load_run", "load_scenario", "simulate"]
