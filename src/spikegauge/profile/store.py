"""The point store: ``PROFILE_DIR/points/<digest>/``.

A point is one run of the profile: a sweep setting, a reference run or a
ladder probe, for one seed. Its digest is the SHA-256 of the scenario
digest, the resolved settings, the seed, the probe (if any), the recorded
step-trace cells, the package version, how its cost is measured, its work
limit, its stop time (a pilot run) and the reference it replays (open loop), so a point is found again exactly
when rerunning it would give the same run.

A point's files (``spikes.npz``, ``run.json``, ``steps.csv`` if any) are
written into a hidden temporary folder that is then renamed onto
``points/<digest>``: an interrupted profile leaves either a complete point or
none. ``comparison.json`` (what separates the point from the reference) is
derived and rewritten whenever the comparison options change.

A point can still be damaged after it was written (a full disk, a copy cut
short, a folder copied under another name): :meth:`PointStore.has` reads a
point's files before it counts as finished, and a point whose ``spikes.npz``
or ``run.json`` is missing, truncated or unreadable, or whose ``run.json``
records another point's digest (saved there as ``point_digest``), is not
finished: it is reported once (:attr:`PointStore.damaged`, and a
:class:`DamagedPointWarning`), computed again and replaced, and never read
into a table. A damaged ``comparison.json`` is derived data: it is reported
the same way and recomputed.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import warnings
from pathlib import Path

from ..errors import InputError
from ..runs import atomic_path, load_run


class DamagedPointWarning(UserWarning):
    """A stored point could not be read, or is another point's; it is computed again."""


def point_digest(task: dict) -> str:
    """Digest of what determines a point's run (see the module docstring)."""
    key = {k: task.get(k) for k in ("scenario_digest", "settings", "seed", "probe",
                                    "record_steps", "version", "timing", "work_limit", "t_stop_ms",
                                    "open_loop")}
    text = json.dumps(key, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:24]


class PointStore:
    """Finished points of one profile folder.

    Parameters
    ----------
    profile_dir : path
        The profile folder; points live under ``points/``.
    """

    def __init__(self, profile_dir):
        self.root = Path(profile_dir) / "points"
        self.root.mkdir(parents=True, exist_ok=True)
        self.damaged: list[tuple[str, str]] = []
        """(digest, what is wrong) of every damaged file found, each point once, in the order found."""
        self._verified: dict = {}  # digest -> Run read by has(), handed out by load()

    def path(self, digest: str) -> Path:
        return self.root / digest

    def has(self, digest: str) -> bool:
        """Whether the point is finished: its files are complete, readable and its own.

        A damaged point is reported (:attr:`damaged`) and counts as not finished,
        so the caller computes it again and :meth:`save` replaces it.
        """
        if digest in self._verified:
            return True
        folder = self.path(digest)
        if not folder.exists():
            return False
        try:
            run = self._read(digest)
        except InputError as exc:
            self._report(digest, str(exc))
            return False
        self._verified[digest] = run
        return True

    def failed(self, digest: str) -> bool:
        """Whether the stored point is a failed run (an error, not a diverged run)."""
        run = self._verified.get(digest)
        if run is None:
            run = self._read(digest)
        return run.status == "failed"

    def save(self, digest: str, run) -> Path:
        """Write a run as the point ``digest``, atomically (replacing an older copy).

        The digest is recorded in ``run.json`` (``point_digest``), so a folder
        that holds another point's files is found out.
        """
        final = self.path(digest)
        self._verified.pop(digest, None)
        run.meta["point_digest"] = digest
        tmp = Path(tempfile.mkdtemp(dir=self.root, prefix=f".{digest}."))
        try:
            run.save(tmp)
            if final.exists():  # --fresh, or a damaged copy: the new run replaces the old
                shutil.rmtree(final)
            os.replace(tmp, final)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        return final

    def load(self, digest: str):
        """The stored run of a point.

        Raises
        ------
        InputError
            The point's files are damaged (see :meth:`has`, which callers ask first).
        """
        run = self._verified.pop(digest, None)
        return run if run is not None else self._read(digest)

    def _read(self, digest: str):
        folder = self.path(digest)
        run = load_run(folder)
        recorded = run.meta.get("point_digest")
        if recorded is not None and recorded != digest:
            raise InputError(f"{folder}: run.json belongs to point {recorded}, not to this folder")
        return run

    def _report(self, digest: str, what: str) -> None:
        if any(d == digest for d, _ in self.damaged):
            return
        self.damaged.append((digest, what))
        warnings.warn(f"damaged point {digest} ({what}); computing it again", DamagedPointWarning,
                      stacklevel=3)

    def read_comparison(self, digest: str) -> dict | None:
        """The stored comparison of a point, or None (none yet, or damaged: then reported)."""
        p = self.path(digest) / "comparison.json"
        if not p.is_file():
            return None
        try:
            doc = json.loads(p.read_text())
        except (OSError, UnicodeDecodeError, ValueError) as exc:
            self._report(digest, f"{p}: unreadable comparison ({exc})")
            return None
        if not isinstance(doc, dict):
            self._report(digest, f"{p}: not a comparison record")
            return None
        return doc

    def write_comparison(self, digest: str, doc: dict) -> None:
        with atomic_path(self.path(digest) / "comparison.json") as tmp:
            Path(tmp).write_text(json.dumps(doc, indent=1, allow_nan=False))
