"""HDF5 access shared by the format readers: content sniffing, opening, and errors as one line.

h5py raises several exception types on damaged or unexpected files (``OSError``
for a broken superblock or B-tree, ``KeyError`` for a missing or unreadable
object, ``RuntimeError``/``ValueError``/``TypeError`` for odd types and shapes).
Every read goes through :func:`reading`, which turns them into an
:class:`~spikegauge.errors.InputError` naming the file and the dataset. A
damaged file can also crash the HDF5 C library outright; nothing in Python can
catch that, which is why the fuzz tests read such files in child processes.
"""
from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..errors import InputError

HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
"""The 8 bytes that open an HDF5 superblock (HDF5 file format specification, section II.A)."""


def is_hdf5(path) -> bool:
    """True if ``path`` holds an HDF5 superblock signature at byte 0 or at 512, 1024, 2048, ...

    The HDF5 format allows a user block before the superblock, of a size that
    is a power of two from 512 bytes; the signature is searched there too.
    """
    try:
        with open(path, "rb") as fh:
            if fh.read(8) == HDF5_SIGNATURE:
                return True
            size = Path(path).stat().st_size
            offset = 512
            while offset + 8 <= size:
                fh.seek(offset)
                if fh.read(8) == HDF5_SIGNATURE:
                    return True
                offset *= 2
    except OSError:
        return False
    return False


def one_line(exc: BaseException) -> str:
    """An exception as ``Type: message`` on one line."""
    return f"{type(exc).__name__}: {' '.join(str(exc).split())}"


@contextmanager
def reading(path, name: str):
    """Turn h5py's exceptions inside the block into an InputError naming ``path`` and ``name``."""
    try:
        yield
    except InputError:
        raise
    except (OSError, KeyError, RuntimeError, ValueError, TypeError, IndexError, MemoryError) as exc:
        raise InputError(f"{path}: {name}: cannot read ({one_line(exc)})") from None


@contextmanager
def open_hdf5(path):
    """Open ``path`` read-only with h5py; a file h5py cannot open is an InputError."""
    import h5py

    try:
        f = h5py.File(path, "r")
    except (OSError, RuntimeError, ValueError) as exc:
        raise InputError(f"{path}: not a readable HDF5 file ({one_line(exc)})") from None
    try:
        yield f
    finally:
        try:
            f.close()
        except Exception:  # closing a damaged file may raise again; the read already failed or succeeded
            pass


def group(parent, key: str, path, name: str):
    """The HDF5 group ``parent[key]``; missing or not a group is an InputError naming ``name``."""
    import h5py

    with reading(path, name):
        if key not in parent:
            raise InputError(f"{path}: {name}: group missing")
        obj = parent[key]
    if not isinstance(obj, h5py.Group):
        raise InputError(f"{path}: {name}: expected a group, found a dataset")
    return obj


def dataset_1d(parent, key: str, path, name: str, kinds: str = "iuf") -> np.ndarray:
    """Read the 1-D dataset ``parent[key]`` whose dtype kind is one of ``kinds``.

    Raises InputError (naming ``name``) if it is missing, not a dataset, not
    1-D, of another type, or unreadable.
    """
    import h5py

    from ..scenario import available_memory_bytes  # (scenario.py imports this package)

    with reading(path, name):
        if key not in parent:
            raise InputError(f"{path}: {name}: dataset missing")
        obj = parent[key]
        if not isinstance(obj, h5py.Dataset):
            raise InputError(f"{path}: {name}: expected a dataset, found a group")
        if obj.ndim != 1:
            raise InputError(f"{path}: {name}: expected a 1-D dataset, got shape {obj.shape}")
        if obj.dtype.kind not in kinds:
            raise InputError(f"{path}: {name}: expected numbers, got dtype {obj.dtype}")
        nbytes = obj.size * obj.dtype.itemsize
        if nbytes > available_memory_bytes():  # a damaged header can claim any size
            raise InputError(f"{path}: {name}: {obj.size} entries ({nbytes / 1e9:.3g} GB) do not fit in the "
                             "memory available")
        return np.asarray(obj[()])


def text_attribute(obj, key: str, path, name: str) -> str | None:
    """A string attribute (str, bytes, a one-element array of either, or an HDF5 enum), or None."""
    import h5py

    with reading(path, f"{name} attribute '{key}'"):
        if key not in obj.attrs:
            return None
        value = obj.attrs[key]
        enum = h5py.check_enum_dtype(obj.attrs.get_id(key).dtype)
    if isinstance(value, np.ndarray) and value.size == 1:
        value = value.ravel()[0]
    if enum is not None and np.ndim(value) == 0:
        names = {int(v): k for k, v in enum.items()}
        value = names.get(int(value), value)
    if isinstance(value, (bytes, np.bytes_)):
        try:
            value = value.decode("utf-8")
        except UnicodeDecodeError:
            raise InputError(f"{path}: {name}: attribute '{key}' is not UTF-8 text") from None
    if not isinstance(value, str):
        raise InputError(f"{path}: {name}: attribute '{key}' must be text, got {value!r}")
    return value
