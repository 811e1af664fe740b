"""The project's own exception types.

``InputError`` is a problem with what the user gave us (a scenario file, a spike
file, an option); the CLI prints its message on one line and exits with status 2.
``ComputationError`` is a computation that could not be carried out; exit status 1.
A numerical blow-up inside a run is *not* an exception: it is a run status.
"""


class SpikegaugeError(Exception):
    """Base class of every error spikegauge raises on purpose."""


class InputError(SpikegaugeError, ValueError):
    """Bad user input: the message names the file and the key path or line."""


class ComputationError(SpikegaugeError, RuntimeError):
    """A computation that could not be carried out (not a diverged run, which is a status)."""
