"""Which format a spike file is in, from its content (not only its name)."""
from __future__ import annotations

from pathlib import Path
from typing import Mapping

from ..errors import InputError
from ._hdf5 import is_hdf5, open_hdf5, reading
from .spike_table import SpikeTable

ZIP_SIGNATURE = b"PK\x03\x04"
"""First bytes of a ZIP archive, which an NPZ file is."""


def spike_file_format(path) -> str:
    """``"hdf5"``, ``"npz"`` or ``"text"``, from the file's first bytes.

    HDF5 files are told apart (SONATA or NWB) by :func:`read_hdf5_spikes`,
    from the groups present. A file named ``.npz`` that is not a ZIP archive is
    still called ``"npz"`` so that its reader says what is wrong with it.
    """
    if is_hdf5(path):
        return "hdf5"
    try:
        with open(path, "rb") as fh:
            head = fh.read(4)
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc})") from None
    if head == ZIP_SIGNATURE or Path(path).suffix.lower() == ".npz":
        return "npz"
    return "text"


def read_hdf5_spikes(path, population: str | Mapping[str, int] | None = None,
                     unit_id_column: str | None = None) -> SpikeTable:
    """Read an HDF5 spike file: SONATA if it has ``/spikes``, NWB if it says it is NWB.

    Parameters
    ----------
    path : str or Path
    population : str or mapping, optional
        SONATA population choice (:func:`.sonata_spikes.read_sonata_spikes`).
    unit_id_column : str, optional
        NWB id column (:func:`.nwb_units.read_nwb_units`).
    """
    from .nwb_units import is_nwb, read_nwb_units
    from .sonata_spikes import read_sonata_spikes

    with open_hdf5(path) as f:
        with reading(path, "/"):
            has_spikes = "spikes" in f
            nwb = is_nwb(f)
        if not has_spikes and not nwb:
            raise InputError(f"{path}: /spikes: group missing (an HDF5 file that is neither a SONATA spike "
                             "file nor an NWB file)")
    if has_spikes:
        return read_sonata_spikes(path, population)
    return read_nwb_units(path, unit_id_column)
