"""The network as flat arrays: builder, drive events and the array contract.

:func:`build_network` turns a validated :class:`~spikegauge.scenario.Scenario`
into a :class:`Network`; :class:`DriveStream` hands a driver the external drive
events window by window.
"""
from .arrays import EventList, Network, PoissonDrive
from .build import build_network
from .drive import DRIVE_BLOCK_MS, DriveStream

__all__ = ["build_network", "DriveStream", "DRIVE_BLOCK_MS", "Network", "PoissonDrive", "EventList"]
