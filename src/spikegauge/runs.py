"""Run objects and the run folder they are stored in.

``RUN_DIR/spikes.npz``: cell (int64), time_ms (float64), n_cells, t_start_ms,
t_stop_ms, group_names, group_first. ``RUN_DIR/run.json``: scenario digest and
text, settings, cost counters, status, versions, threads. Files are written to
a temporary name and renamed, so a crash never leaves a truncated file.
"""
from __future__ import annotations

import json
import os
import tempfile
import zipfile
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError


@dataclass
class Run:
    """The result of one simulation.

    Attributes
    ----------
    spikes : pandas.DataFrame
        Columns ``cell`` (int64) and ``time_ms`` (float64), sorted by time, then cell.
    n_cells : int
    t_start_ms, t_stop_ms : float
        Simulated span; ``t_stop_ms`` is the time reached (earlier than asked if diverged).
    group_names : tuple of str
    group_first : ndarray of int64, shape (n_groups + 1,)
    settings : dict
        Strategy, stepper, dt or tolerances, crossing, delivery, threads.
    status : str
        ``"ok"``, ``"diverged"``, or ``"failed"`` (a profile point whose run raised an error).
    message : str
        For a diverged run, where and why.
    cost : dict
        steps, rhs_evals, newton_iters, arrivals, rejected_steps, jacobian_evals, wall_s (loop only,
        compilation excluded), spikes.
    meta : dict
        Scenario name, digest and text, seed, versions.
    traces : pandas.DataFrame or None
        Recorded state traces (cell, time_ms, one column per state) if asked for.
    """

    spikes: pd.DataFrame
    n_cells: int
    t_start_ms: float
    t_stop_ms: float
    group_names: tuple
    group_first: np.ndarray
    settings: dict
    status: str = "ok"
    message: str = ""
    cost: dict = field(default_factory=dict)
    meta: dict = field(default_factory=dict)
    traces: pd.DataFrame | None = None
    step_trace: pd.DataFrame | None = None

    @property
    def mean_rate_hz(self) -> float:
        span_s = (self.t_stop_ms - self.t_start_ms) / 1000.0
        return len(self.spikes) / (self.n_cells * span_s) if span_s > 0 else float("nan")

    def __repr__(self) -> str:
        return (f"Run({self.settings.get('strategy')}, {len(self.spikes)} spikes, "
                f"{self.n_cells} cells, {self.t_start_ms:g}-{self.t_stop_ms:g} ms, {self.status})")

    def save(self, directory) -> Path:
        """Write ``spikes.npz`` and ``run.json`` (and traces if any) into ``directory``."""
        d = Path(directory)
        d.mkdir(parents=True, exist_ok=True)
        with _atomic(d / "spikes.npz") as tmp:
            with open(tmp, "wb") as fh:
                np.savez(
                    fh,
                    cell=self.spikes["cell"].to_numpy(np.int64),
                    time_ms=self.spikes["time_ms"].to_numpy(np.float64),
                    n_cells=np.int64(self.n_cells),
                    t_start_ms=np.float64(self.t_start_ms),
                    t_stop_ms=np.float64(self.t_stop_ms),
                    group_names=np.array(self.group_names, dtype=str),
                    group_first=np.asarray(self.group_first, dtype=np.int64),
                )
        doc = dict(status=self.status, message=self.message, settings=self.settings,
                   cost=self.cost, n_cells=self.n_cells, t_start_ms=self.t_start_ms,
                   t_stop_ms=self.t_stop_ms, **self.meta)
        with _atomic(d / "run.json") as tmp:
            Path(tmp).write_text(json.dumps(doc, indent=1, default=_json_default))
        for name, table in (("traces.csv", self.traces), ("steps.csv", self.step_trace)):
            if table is not None:
                with _atomic(d / name) as tmp:
                    table.to_csv(tmp, index=False)
        return d


def load_run(directory) -> Run:
    """Read a run folder written by :meth:`Run.save`.

    Raises
    ------
    InputError
        A file is missing, truncated or unreadable, or ``run.json`` is not a run
        record (every array of ``spikes.npz`` is read, so a damaged one shows here).
    """
    d = Path(directory)
    try:
        with np.load(d / "spikes.npz", allow_pickle=False) as z:
            spikes = pd.DataFrame({"cell": z["cell"].astype(np.int64),
                                   "time_ms": z["time_ms"].astype(np.float64)})
            n_cells = int(z["n_cells"])
            t_start, t_stop = float(z["t_start_ms"]), float(z["t_stop_ms"])
            names = tuple(str(s) for s in z["group_names"])
            first = z["group_first"].astype(np.int64)
        doc = json.loads((d / "run.json").read_text())
    except FileNotFoundError as exc:
        raise InputError(f"{d}: not a run folder (missing {Path(exc.filename).name})") from None
    except (KeyError, ValueError, OSError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
        # a truncated or overwritten file: a bad zip, a bad CRC, half a JSON document
        raise InputError(f"{d}: unreadable run folder ({type(exc).__name__}: {exc})") from None
    if not (isinstance(doc, dict) and isinstance(doc.get("settings"), dict)
            and isinstance(doc.get("status"), str)):
        raise InputError(f"{d}: run.json is not a run record (no settings or no status)")
    if doc.get("n_cells", n_cells) != n_cells:
        raise InputError(f"{d}: run.json and spikes.npz disagree on the number of cells "
                         f"({doc.get('n_cells')} and {n_cells})")
    settings = doc.pop("settings", {})
    status = doc.pop("status", "ok")
    message = doc.pop("message", "")
    cost = doc.pop("cost", {})
    for key in ("n_cells", "t_start_ms", "t_stop_ms"):
        doc.pop(key, None)
    try:
        traces = pd.read_csv(d / "traces.csv") if (d / "traces.csv").exists() else None
        steps = pd.read_csv(d / "steps.csv") if (d / "steps.csv").exists() else None
    except (ValueError, OSError) as exc:  # pandas' parser errors are ValueErrors
        raise InputError(f"{d}: unreadable run folder ({type(exc).__name__}: {exc})") from None
    return Run(spikes=spikes, n_cells=n_cells, t_start_ms=t_start, t_stop_ms=t_stop,
               group_names=names, group_first=first, settings=settings, status=status,
               message=message, cost=cost, meta=doc, traces=traces, step_trace=steps)


class _atomic:
    """Context manager yielding a temporary path renamed onto ``path`` on success."""

    def __init__(self, path: Path):
        self.path = Path(path)

    def __enter__(self) -> str:
        fd, self.tmp = tempfile.mkstemp(dir=self.path.parent, prefix=f".{self.path.name}.")
        os.close(fd)
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            os.replace(self.tmp, self.path)
        else:
            try:
                os.unlink(self.tmp)
            except OSError:
                pass
        return False


def atomic_path(path) -> _atomic:
    """Public form of the atomic-write helper (used by the profile store)."""
    return _atomic(Path(path))


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")
