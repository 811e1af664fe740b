"""Spike rasters: one normalised table of (cell, time) and the readers that build it.

Every comparison works on :class:`Raster`, whatever the spikes came from: a run
folder (``spikes.npz``), an object with a ``.spikes`` table (a run), a pandas
DataFrame, an NPZ file or a two-column text file written by any simulator, or
a file or object of an open format of the field (SONATA spike file, NWB units
table, list of ``neo.SpikeTrain``; readers in :mod:`spikegauge.formats`).
Files are told apart by their content (HDF5 and ZIP signatures), not only
their names.
Readers validate as they go and raise :class:`~spikegauge.errors.InputError`
naming the file and the line (text files) or entry (arrays) at fault.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from ..errors import InputError

TIME_UNITS = {"ms": 1.0, "s": 1000.0}
"""Accepted time units of spike files and their factor to milliseconds."""


@dataclass(frozen=True, eq=False)
class Raster:
    """Spikes of a population, sorted by (cell, time).

    Build it with :meth:`from_arrays` (or the readers), which validates, sorts
    and counts duplicates; the constructor trusts its arguments.

    Attributes
    ----------
    cell : ndarray of int64, shape (n_spikes,)
        Cell id of each spike, ``0 <= cell < n_cells``.
    time_ms : ndarray of float64, shape (n_spikes,)
        Spike times (ms), ``t_start_ms <= time_ms < t_stop_ms``.
    n_cells : int
        Number of cells, silent ones included.
    t_start_ms, t_stop_ms : float
        The observed interval (ms).
    group_names : tuple of str
        Names of the groups of cells, in id order.
    group_first : ndarray of int64, shape (n_groups,)
        First cell id of each group (``group_first[0] == 0``). Readers also
        accept a trailing entry (the first id past the last group) and drop it.
    source : str
        Where the spikes came from (a path or a description), for messages.
    n_duplicates : int
        Spikes that repeat an earlier (cell, time) exactly; they are kept.
    offsets : ndarray of int64, shape (n_cells + 1,)
        Spikes of cell ``c`` are ``time_ms[offsets[c]:offsets[c + 1]]``.
    """

    cell: np.ndarray
    time_ms: np.ndarray
    n_cells: int
    t_start_ms: float
    t_stop_ms: float
    group_names: tuple = ("all",)
    group_first: np.ndarray = field(default_factory=lambda: np.zeros(1, np.int64))
    source: str = "<memory>"
    n_duplicates: int = 0
    offsets: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        offsets = np.searchsorted(self.cell, np.arange(self.n_cells + 1)).astype(np.int64)
        object.__setattr__(self, "offsets", offsets)

    @classmethod
    def from_arrays(cls, cell, time_ms, *, n_cells=None, t_start_ms=None, t_stop_ms=None,
                    group_names=None, group_first=None, source="<memory>", where="entry"):
        """Validate, sort and wrap spike arrays.

        Parameters
        ----------
        cell : array_like of int, shape (n_spikes,)
            Cell ids (>= 0).
        time_ms : array_like of float, shape (n_spikes,)
            Spike times (ms), finite.
        n_cells : int, optional
            Cell count; default ``max(cell) + 1`` (0 for no spikes).
        t_start_ms, t_stop_ms : float, optional
            Observed interval (ms). Spikes outside ``[t_start_ms, t_stop_ms)``
            are dropped (a later start skips an initial transient). Defaults:
            0 (or the first spike if earlier) and just past the last spike.
        group_names, group_first : optional
            Group structure; default one group ``"all"``.
        source : str
            Named in error messages.
        where : str
            What a position is called in messages ("entry", "row", "line").

        Raises
        ------
        InputError
            Negative or non-integer ids, non-finite times, ids beyond ``n_cells``.
        """
        cell = np.asarray(cell)
        time_ms = np.asarray(time_ms, dtype=np.float64)
        if cell.shape != time_ms.shape or cell.ndim != 1:
            raise InputError(f"{source}: cell and time arrays must be 1-D and of equal length, "
                             f"got shapes {cell.shape} and {time_ms.shape}")
        if cell.dtype.kind == "f":
            bad = ~np.isfinite(cell) | (cell != np.round(cell))
            if bad.any():
                i = int(np.argmax(bad))
                raise InputError(f"{source}: {where} {i}: cell id {cell[i]!r} is not an integer")
        elif cell.dtype.kind not in "iub" and cell.size:
            raise InputError(f"{source}: cell ids must be integers, got dtype {cell.dtype}")
        cell = cell.astype(np.int64)
        _check_values(cell, time_ms, source, where, lambda i: i)
        n_found = int(cell.max()) + 1 if cell.size else 0
        if n_cells is None:
            n_cells = n_found
            if n_cells > max_cells():
                i = int(np.argmax(cell))
                raise InputError(f"{source}: {where} {i}: cell id {cell[i]} implies {n_cells:.3g} cells, "
                                 f"more than this machine can compare ({max_cells():.3g}); give the "
                                 "cell count (--cells) if ids are sparse labels")
        elif not 0 <= n_cells <= max_cells():
            raise InputError(f"{source}: n_cells = {n_cells} is not between 0 and {max_cells():.3g}, "
                             "the most this machine can compare")
        elif n_found > n_cells:
            i = int(np.argmax(cell >= n_cells))
            raise InputError(f"{source}: {where} {i}: cell id {cell[i]} but the raster has "
                             f"{n_cells} cells (ids 0..{n_cells - 1})")
        if t_start_ms is None:
            t_start_ms = min(0.0, float(time_ms.min())) if time_ms.size else 0.0
        if t_stop_ms is None:
            t_stop_ms = float(np.nextafter(time_ms.max(), np.inf)) if time_ms.size else t_start_ms
        if not t_stop_ms >= t_start_ms:
            raise InputError(f"{source}: t_stop_ms = {t_stop_ms} is before t_start_ms = {t_start_ms}")
        keep = (time_ms >= t_start_ms) & (time_ms < t_stop_ms)
        cell, time_ms = cell[keep], time_ms[keep]
        order = np.lexsort((time_ms, cell))
        cell, time_ms = cell[order], time_ms[order]
        dup = (np.diff(cell) == 0) & (np.diff(time_ms) == 0)
        if group_names is None:
            group_names, group_first = ("all",), np.zeros(1, np.int64)
        group_names = tuple(str(g) for g in np.atleast_1d(group_names))
        # A trailing boundary (first id past the last group, CSR style) is accepted and dropped.
        group_first = np.atleast_1d(np.asarray(group_first, dtype=np.int64))[:len(group_names)]
        if group_first.size != len(group_names) or group_first[0] != 0 or np.any(np.diff(group_first) < 0):
            raise InputError(f"{source}: group_first {group_first.tolist()} does not describe "
                             f"{len(group_names)} groups starting at cell 0")
        return cls(cell=np.ascontiguousarray(cell), time_ms=np.ascontiguousarray(time_ms),
                   n_cells=int(n_cells), t_start_ms=float(t_start_ms), t_stop_ms=float(t_stop_ms),
                   group_names=group_names, group_first=group_first, source=str(source),
                   n_duplicates=int(dup.sum()))

    @property
    def n_spikes(self) -> int:
        """Number of spikes."""
        return int(self.time_ms.size)

    @property
    def duration_ms(self) -> float:
        """Length of the observed interval (ms)."""
        return self.t_stop_ms - self.t_start_ms

    def train(self, c: int) -> np.ndarray:
        """Sorted spike times (ms) of cell ``c``."""
        return self.time_ms[self.offsets[c]:self.offsets[c + 1]]

    def counts(self) -> np.ndarray:
        """Spike count per cell, shape (n_cells,)."""
        return np.diff(self.offsets)

    def group_of(self, cells) -> np.ndarray:
        """Group index of each cell id in ``cells``."""
        return np.searchsorted(self.group_first, cells, side="right") - 1

    def spikes(self) -> pd.DataFrame:
        """The spikes as a DataFrame with columns ``cell`` and ``time_ms``."""
        return pd.DataFrame({"cell": self.cell, "time_ms": self.time_ms})

    def restricted(self, t_start_ms: float, t_stop_ms: float, n_cells: int | None = None) -> "Raster":
        """The same raster on ``[t_start_ms, t_stop_ms)`` (and possibly more silent cells)."""
        keep = (self.time_ms >= t_start_ms) & (self.time_ms < t_stop_ms)
        cell, time_ms = self.cell[keep], self.time_ms[keep]
        dup = (np.diff(cell) == 0) & (np.diff(time_ms) == 0)
        return Raster(cell=cell, time_ms=time_ms,
                      n_cells=self.n_cells if n_cells is None else int(n_cells),
                      t_start_ms=float(t_start_ms), t_stop_ms=float(t_stop_ms),
                      group_names=self.group_names, group_first=self.group_first,
                      source=self.source, n_duplicates=int(dup.sum()))


def _check_values(cell, time_ms, source, where, position):
    """Raise on negative ids and non-finite times; ``position(i)`` names index ``i``."""
    bad = cell < 0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{source}: {where} {position(i)}: negative cell id {cell[i]}")
    bad = ~np.isfinite(time_ms)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{source}: {where} {position(i)}: spike time {time_ms[i]} is not finite")


# ---------------------------------------------------------------------------
# Readers. Each returns a _Table: spikes with labels not yet turned into ids
# (text files may name their cells), plus whatever the source knows about the
# cell count, the interval and the groups.


@dataclass
class _Table:
    labels: np.ndarray          # int64 ids, or str names (text files only)
    time_ms: np.ndarray
    source: str
    where: str = "entry"
    lines: np.ndarray | None = None      # line number of each spike (text files)
    n_cells: int | None = None
    t_start_ms: float | None = None
    t_stop_ms: float | None = None
    group_names: tuple | None = None
    group_first: np.ndarray | None = None
    place: Callable[[int], str] | None = None   # names spike i in the file (open formats)

    @property
    def named(self) -> bool:
        return self.labels.dtype.kind not in "iu"


def read_run_spikes(run_dir) -> Raster:
    """Read ``RUN_DIR/spikes.npz`` of a run folder into a :class:`Raster`.

    Parameters
    ----------
    run_dir : str or Path
        The run folder.
    """
    return _to_raster(_read_npz(Path(run_dir) / "spikes.npz"))


def _read_npz(path: Path) -> _Table:
    """Read an NPZ of spikes; its ``time_ms`` key is in ms whatever the time unit option says."""
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except Exception as exc:  # EOFError, zipfile.BadZipFile, CRC errors, OSError, ValueError...
        raise InputError(f"{path}: not a readable NPZ file ({type(exc).__name__}: "
                         f"{' '.join(str(exc).split())})") from None
    if not isinstance(arrays, dict) or not arrays:
        raise InputError(f"{path}: not a readable NPZ file (no arrays)")
    for key in ("cell", "time_ms"):
        if key not in arrays:
            raise InputError(f"{path}: key '{key}' missing (need 'cell' and 'time_ms')")
    cell, time_ms = arrays["cell"].ravel(), arrays["time_ms"].ravel()
    if cell.size != time_ms.size:
        raise InputError(f"{path}: 'cell' has {cell.size} entries but 'time_ms' has {time_ms.size}")
    if cell.dtype.kind == "f":
        bad = ~np.isfinite(cell) | (cell != np.round(cell))
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{path}: entry {i}: cell id {cell[i]} is not an integer")
    elif cell.dtype.kind not in "iu":
        raise InputError(f"{path}: 'cell' must hold integers, got dtype {cell.dtype}")
    if cell.dtype.kind == "u" and cell.size and cell.max() > np.iinfo(np.int64).max:
        i = int(np.argmax(cell > np.iinfo(np.int64).max))
        raise InputError(f"{path}: entry {i}: cell id {cell[i]} is too large")
    if time_ms.dtype.kind not in "iuf":
        raise InputError(f"{path}: 'time_ms' must be numeric, got dtype {time_ms.dtype}")
    table = _Table(labels=cell.astype(np.int64), time_ms=time_ms.astype(np.float64),
                   source=str(path))
    _check_values(table.labels, table.time_ms, table.source, "entry", lambda i: i)

    table.n_cells = _npz_scalar(arrays, "n_cells", path, integer=True)
    table.t_start_ms = _npz_scalar(arrays, "t_start_ms", path)
    table.t_stop_ms = _npz_scalar(arrays, "t_stop_ms", path)
    if "group_names" in arrays and "group_first" in arrays:
        names = np.atleast_1d(arrays["group_names"])
        first = np.atleast_1d(arrays["group_first"])
        if names.ndim != 1 or names.size == 0:
            raise InputError(f"{path}: group_names: needs at least one name")
        if first.ndim != 1 or first.dtype.kind not in "iu" or first.size not in (names.size, names.size + 1) \
                or (first.size and (first[0] != 0 or np.any(np.diff(first.astype(np.int64)) < 0))):
            raise InputError(f"{path}: group_first: must be {names.size} non-decreasing integers "
                             "starting at 0 (one per group name)")
        table.group_names = tuple(str(g) for g in names)
        table.group_first = first.astype(np.int64)
    return table


BYTES_PER_CELL = 512
"""Rough memory a comparison needs per cell (offsets, per-cell tables and distances)."""


def max_cells() -> int:
    """The largest cell count whose per-cell arrays fit in the memory available now."""
    from ..scenario import available_memory_bytes
    return int(available_memory_bytes() // BYTES_PER_CELL)


def _npz_scalar(arrays: dict, key: str, path: Path, integer: bool = False):
    """A scalar entry of an NPZ file: a finite number (a non-negative integer for counts), or None."""
    if key not in arrays:
        return None
    a = arrays[key]
    kind = "a non-negative integer" if integer else "a finite number"
    if a.ndim != 0 or a.dtype.kind not in "iuf":
        got = f"an array of shape {a.shape}" if a.ndim else f"a value of type {a.dtype}"
        raise InputError(f"{path}: {key}: must be {kind}, got {got}")
    v = a.item()
    if not np.isfinite(v) or (integer and (v < 0 or v != int(v))):
        raise InputError(f"{path}: {key}: must be {kind}, got {v!r}")
    return int(v) if integer else float(v)


def _read_text(path: Path, factor: float) -> _Table:
    """Read a two-column text file (cell, time), comma, semicolon, tab or space separated.

    A first line of two words (neither a number) is a header; a header whose
    first column names the time (``time``...) swaps the columns.
    """
    try:
        with open(path, "r", encoding="utf-8-sig") as fh:
            first = None
            for line in fh:
                if line.strip():
                    first = line
                    break
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read ({exc})") from None
    if first is None:
        raise InputError(f"{path}: line 1: file is empty")
    sep = next((s for s in (",", ";", "\t") if s in first), r"\s+")
    try:
        frame = pd.read_csv(path, sep=sep, header=None, names=[0, 1, 2], dtype=str,
                            skip_blank_lines=False, keep_default_na=False, engine="c",
                            skipinitialspace=True, encoding="utf-8-sig")
    except pd.errors.ParserError as exc:
        m = re.search(r"line (\d+), saw (\d+)", str(exc))
        if m:
            raise InputError(f"{path}: line {m.group(1)}: expected 2 columns, found {m.group(2)}") from None
        raise InputError(f"{path}: cannot parse ({exc})") from None
    line_no = np.arange(1, len(frame) + 1, dtype=np.int64)   # blank lines are kept as rows
    a = frame[0].str.strip().to_numpy(dtype=object)
    b = frame[1].str.strip().to_numpy(dtype=object)
    c = frame[2].to_numpy(dtype=object)
    blank = (a == "") & (b == "") & np.array([v == "" for v in c], dtype=bool)
    a, b, c, line_no = a[~blank], b[~blank], c[~blank], line_no[~blank]
    time_first = False
    if a.size and _to_float(b[:1])[0] is None and _to_float(a[:1])[0] is None:
        # Header: the time column is the one whose name says so.
        time_first = "time" in str(a[0]).lower() and "time" not in str(b[0]).lower()
        a, b, c, line_no = a[1:], b[1:], c[1:], line_no[1:]
    extra = np.array([v != "" for v in c], dtype=bool)
    if extra.any():
        i = int(np.argmax(extra))
        raise InputError(f"{path}: line {line_no[i]}: expected 2 columns, found 3")
    labels, times = (b, a) if time_first else (a, b)
    short = np.array([v == "" for v in times], dtype=bool)
    if short.any():
        i = int(np.argmax(short))
        if len(_fields(path, line_no[i], sep)) < 2:
            raise InputError(f"{path}: line {line_no[i]}: expected 2 columns, found 1")
        raise InputError(f"{path}: line {line_no[i]}: missing spike time")
    missing = np.array([v == "" for v in labels], dtype=bool)
    if missing.any():
        i = int(np.argmax(missing))
        raise InputError(f"{path}: line {line_no[i]}: missing cell id")
    time_ms = _to_float(times)
    bad = np.array([v is None for v in time_ms], dtype=bool)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{path}: line {line_no[i]}: spike time {times[i]!r} is not a number")
    time_ms = time_ms.astype(np.float64) * factor
    bad = ~np.isfinite(time_ms)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{path}: line {line_no[i]}: spike time {times[i]!r} is not finite")
    ids = _to_float(labels)
    if all(v is not None for v in ids):
        ids = ids.astype(np.float64)
        bad = ~np.isfinite(ids) | (ids != np.round(ids))
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{path}: line {line_no[i]}: cell id {labels[i]!r} is not an integer")
        bad = ids < 0
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{path}: line {line_no[i]}: negative cell id {labels[i]!r}")
        label_arr = ids.astype(np.int64)
    else:
        label_arr = labels.astype(str)
    return _Table(labels=label_arr, time_ms=time_ms, source=str(path), where="line", lines=line_no)


def _fields(path: Path, line_no: int, sep: str) -> list[str]:
    """The fields of one line of a text file (for precise messages on a bad line)."""
    with open(path, "r", encoding="utf-8-sig") as fh:
        for no, line in enumerate(fh, start=1):
            if no == line_no:
                return line.split() if sep == r"\s+" else line.rstrip("\r\n").split(sep)
    return []


def _to_float(values: np.ndarray) -> np.ndarray:
    """Parse strings as floats; entries that are not numbers become None (NaN/inf do parse)."""
    out = pd.to_numeric(pd.Series(values, dtype=object), errors="coerce").to_numpy(dtype=object)
    nan = pd.isna(out)
    if nan.any():
        # 'nan' parses to NaN on purpose; anything else that coerced to NaN is not a number.
        words = np.array([str(v).strip().lower() in ("nan", "+nan", "-nan") for v in values[nan]], dtype=bool)
        idx = np.flatnonzero(nan)
        out[idx[words]] = np.nan
        out[idx[~words]] = None
    return out


def _from_frame(frame: pd.DataFrame, source: str) -> _Table:
    for key in ("cell", "time_ms"):
        if key not in frame.columns:
            raise InputError(f"{source}: column '{key}' missing (need 'cell' and 'time_ms')")
    cell = frame["cell"].to_numpy()
    time_ms = pd.to_numeric(frame["time_ms"], errors="coerce").to_numpy(dtype=np.float64)
    if cell.dtype.kind not in "iu":
        num = pd.to_numeric(pd.Series(cell), errors="coerce").to_numpy(dtype=np.float64)
        bad = ~np.isfinite(num) | (num != np.round(num))
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{source}: row {i}: cell id {cell[i]!r} is not an integer")
        cell = num
    table = _Table(labels=cell.astype(np.int64), time_ms=time_ms, source=source, where="row")
    _check_values(table.labels, time_ms, source, "row", lambda i: i)
    return table


def _read_source(obj: Any, factor: float, name: str | None, population=None,
                 unit_id_column: str | None = None) -> _Table | Raster:
    """Dispatch on what ``obj`` is; a Raster passes through."""
    from .. import formats

    if isinstance(obj, Raster):
        return obj
    if formats.is_train_list(obj):
        return _from_spike_table(formats.read_neo_trains(obj, name or "<neo.SpikeTrain list>"))
    if isinstance(obj, pd.DataFrame):
        return _from_frame(obj, name or "<DataFrame>")
    if hasattr(obj, "spikes") and hasattr(obj, "n_cells"):
        # A run object (duck typed: the analysis does not import the engine).
        table = _from_frame(obj.spikes, name or f"<{type(obj).__name__}>")
        table.n_cells = int(obj.n_cells)
        table.t_start_ms = float(obj.t_start_ms)
        table.t_stop_ms = float(obj.t_stop_ms)
        table.group_names = tuple(str(g) for g in obj.group_names)
        table.group_first = np.asarray(obj.group_first, dtype=np.int64)
        return table
    if isinstance(obj, (str, Path)):
        path = Path(obj)
        if path.is_dir():
            return _read_npz(path / "spikes.npz")
        if not path.exists():
            raise InputError(f"{path}: no such file or folder")
        kind = formats.spike_file_format(path)
        if kind == "hdf5":
            return _from_spike_table(formats.read_hdf5_spikes(path, population, unit_id_column))
        if kind == "npz":
            return _read_npz(path)
        return _read_text(path, factor)
    raise InputError(f"cannot read spikes from a {type(obj).__name__}: give a run folder, an NPZ, CSV, "
                     "SONATA or NWB file, a DataFrame with 'cell' and 'time_ms', a run, or a list of "
                     "neo.SpikeTrain")


def _from_spike_table(t) -> _Table:
    """A reader's table of an open format (:class:`spikegauge.formats.SpikeTable`) as a _Table."""
    return _Table(labels=t.cell, time_ms=t.time_ms, source=t.source, where="spike", place=t.place,
                  n_cells=t.n_cells, t_start_ms=t.t_start_ms, t_stop_ms=t.t_stop_ms,
                  group_names=t.group_names, group_first=t.group_first)


def _to_raster(table: _Table, **override) -> Raster:
    kw = dict(n_cells=table.n_cells, t_start_ms=table.t_start_ms, t_stop_ms=table.t_stop_ms,
              group_names=table.group_names, group_first=table.group_first)
    kw.update({k: v for k, v in override.items() if v is not None})
    try:
        return Raster.from_arrays(table.labels, table.time_ms, source=table.source,
                                  where=table.where, **kw)
    except InputError as exc:
        if table.lines is None and table.place is None:
            raise
        # Translate a spike index into the file's line number or dataset entry.
        m = re.match(rf"{re.escape(table.source)}: {re.escape(table.where)} (\d+): (.*)", str(exc))
        if not m:
            raise
        i = int(m.group(1))
        place = f"line {table.lines[i]}" if table.lines is not None else table.place(i)
        raise InputError(f"{table.source}: {place}: {m.group(2)}") from None


def load_rasters(sources: Sequence, *, n_cells: int | None = None, t_start_ms: float | None = None,
                 t_stop_ms: float | None = None, time_unit: str = "ms",
                 names: Sequence[str] | None = None, population: str | Mapping[str, int] | None = None,
                 unit_id_column: str | None = None) -> list[Raster]:
    """Read several spike sources onto one common cell numbering and interval.

    Parameters
    ----------
    sources : sequence
        Each a :class:`Raster`, a run folder, an NPZ file (keys ``cell``,
        ``time_ms`` and optionally ``n_cells``, ``t_start_ms``, ``t_stop_ms``,
        ``group_names``, ``group_first``), a text file of two columns (cell,
        time; header optional), a DataFrame with ``cell`` and ``time_ms``, or
        an object with ``.spikes``, ``.n_cells``, ``.t_start_ms``,
        ``.t_stop_ms``, ``.group_names`` and ``.group_first`` (a run), a
        SONATA spike file, an NWB file (its units table), or a list of
        ``neo.SpikeTrain`` (train ``k`` is cell ``k``).
    n_cells : int, optional
        Cell count, for sources that do not carry one. Default: the largest
        count any source declares, else the largest id + 1.
    t_start_ms, t_stop_ms : float, optional
        Interval compared (ms); override what sources declare. A later start
        skips an initial transient. Defaults: the common part of the declared
        intervals; for sources without one, 0 (or the first spike) to just
        past the last spike of all sources.
    time_unit : {"ms", "s"}
        Unit of the times in text files (NPZ files hold ``time_ms``).
    names : sequence of str, optional
        Names used in messages instead of the sources' own.
    population : str or mapping of str -> int, optional
        SONATA spike files: None reads every population with node ids kept as
        cell ids; a name reads that population; ``{name: first_cell}`` reads
        those populations, node id ``n`` becoming cell ``first_cell + n``.
    unit_id_column : str, optional
        NWB files: the units-table column (``"id"`` for the row ids) giving each
        unit's cell id; default: unit ``k`` of the table is cell ``k``.

    Returns
    -------
    list of Raster
        One per source, all with the same ``n_cells`` and interval.

    Notes
    -----
    Text files may label cells with integers (used as ids) or with any other
    words; if any file uses words, the labels of all text files are mapped to
    0, 1, ... in the sorted order of the union of their labels (numbers in
    numeric order first), so the same label means the same cell in every file.
    """
    if time_unit not in TIME_UNITS:
        raise InputError(f"time unit must be one of {sorted(TIME_UNITS)}, got {time_unit!r}")
    factor = TIME_UNITS[time_unit]
    names = list(names) if names is not None else [None] * len(sources)
    items = [_read_source(obj, factor, name, population, unit_id_column) for obj, name in zip(sources, names)]
    tables = [t for t in items if isinstance(t, _Table)]
    if any(t.named for t in tables):
        def key(label):
            try:
                return (0, float(label), "")
            except ValueError:
                return (1, 0.0, label)
        union = sorted({str(v) for t in tables for v in np.unique(t.labels.astype(str))}, key=key)
        index = {label: i for i, label in enumerate(union)}
        for t in tables:
            t.labels = np.array([index[str(v)] for v in t.labels], dtype=np.int64)
        if n_cells is not None and n_cells < len(union):
            raise InputError(f"--cells {n_cells} is fewer than the {len(union)} cell labels in the files")
    declared = [t.n_cells for t in items if t.n_cells is not None]
    if len(set(declared)) > 1:
        raise InputError("the sources describe networks of different sizes: " + ", ".join(
            f"{t.source} has {t.n_cells} cells" for t in items if t.n_cells is not None))
    if n_cells is None:
        for t in tables:  # name the file whose ids imply more cells than fit in memory
            if t.labels.size and int(t.labels.max()) + 1 > max_cells():
                i = int(np.argmax(t.labels))
                place = f"line {t.lines[i]}" if t.lines is not None else \
                    t.place(i) if t.place is not None else f"{t.where} {i}"
                raise InputError(f"{t.source}: {place}: cell id {t.labels[i]} implies "
                                 f"{int(t.labels[i]) + 1:.3g} cells, more than this machine can "
                                 f"compare ({max_cells():.3g}); give the cell count (--cells)")
        found = [int(t.labels.max()) + 1 for t in tables if t.labels.size]
        found += [r.n_cells for r in items if isinstance(r, Raster)]
        n_cells = declared[0] if declared else max(found, default=0)
    starts = [t.t_start_ms for t in items if t.t_start_ms is not None]
    stops = [t.t_stop_ms for t in items if t.t_stop_ms is not None]
    all_times = [t.time_ms for t in items if t.time_ms.size]
    if t_start_ms is None:
        t_start_ms = max(starts) if starts else min(0.0, min((float(t.min()) for t in all_times), default=0.0))
    if t_stop_ms is None:
        if stops:
            t_stop_ms = min(stops)
        else:
            last = max((float(t.max()) for t in all_times), default=t_start_ms)
            t_stop_ms = float(np.nextafter(last, np.inf))
            warnings.warn(f"no interval given: comparing from {t_start_ms} ms to the last spike at "
                          f"{last} ms; pass t_stop_ms (--t-stop-ms) for the simulated interval",
                          stacklevel=2)
    if not t_stop_ms > t_start_ms:
        raise InputError(f"empty interval: t_start_ms = {t_start_ms}, t_stop_ms = {t_stop_ms}")
    out = []
    for item in items:
        if isinstance(item, Raster):
            if item.n_cells > n_cells:
                raise InputError(f"{item.source}: has {item.n_cells} cells, more than {n_cells}")
            same = (item.n_cells, item.t_start_ms, item.t_stop_ms) == (n_cells, t_start_ms, t_stop_ms)
            out.append(item if same else item.restricted(t_start_ms, t_stop_ms, n_cells))
        else:
            out.append(_to_raster(item, n_cells=n_cells, t_start_ms=t_start_ms, t_stop_ms=t_stop_ms))
    groups = next(((r.group_names, r.group_first) for r in out if len(r.group_names) > 1), None)
    if groups is not None:
        out = [r if len(r.group_names) > 1 else Raster(
            cell=r.cell, time_ms=r.time_ms, n_cells=r.n_cells, t_start_ms=r.t_start_ms,
            t_stop_ms=r.t_stop_ms, group_names=groups[0], group_first=groups[1], source=r.source,
            n_duplicates=r.n_duplicates) for r in out]
    return out


def as_raster(obj, **kwargs) -> Raster:
    """Read one spike source into a :class:`Raster` (see :func:`load_rasters` for the options)."""
    return load_rasters([obj], **kwargs)[0]
