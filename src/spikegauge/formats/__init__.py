"""Open formats of the field: spike rasters (SONATA spike files, NWB units tables,
lists of ``neo.SpikeTrain``) and connectivity (SONATA edges files).

Public names::

    read_hdf5_spikes(path, population=None, unit_id_column=None) -> SpikeTable   (SONATA or NWB, by content)
    read_sonata_spikes(path, population=None) -> SpikeTable
    write_sonata_spikes(path, cell, time_ms, n_cells=..., ...) -> Path
    write_run_sonata(run_dir) -> Path   (RUN_DIR/spikes.h5 from RUN_DIR/spikes.npz)
    write_profile_sonata(profile_dir) -> list[Path]   (every stored point)
    read_nwb_units(path, id_column=None) -> SpikeTable
    read_neo_trains(trains) -> SpikeTable
    read_sonata_edges(path, population=None, edge_types=None) -> SonataEdges

h5py is a dependency of spikegauge; pynwb and neo come with the ``formats``
extra, and their readers say so in one line when they are missing.
"""
from .detect import read_hdf5_spikes, spike_file_format
from .neo_trains import is_train_list, read_neo_trains
from .nwb_units import read_nwb_units
from .sonata_edges import SonataEdges, read_sonata_edges
from .sonata_spikes import read_sonata_spikes, write_profile_sonata, write_run_sonata, write_sonata_spikes
from .spike_table import SpikeTable

__all__ = ["read_hdf5_spikes", "spike_file_format", "is_train_list", "read_neo_trains", "read_nwb_units",
           "SonataEdges", "read_sonata_edges", "read_sonata_spikes", "write_profile_sonata",
           "write_run_sonata", "write_sonata_spikes", "SpikeTable"]
