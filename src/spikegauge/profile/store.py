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
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from pathlib import Path

from ..runs import atomic_path, load_run


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

    def path(self, digest: str) -> Path:
        return self.root / digest

    def has(self, digest: str) -> bool:
        """Whether the point was finished (its folder is complete once it exists)."""
        return (self.path(digest) / "run.json").is_file()

    def failed(self, digest: str) -> bool:
        """Whether the stored point is a failed run (an error, not a diverged run)."""
        doc = json.loads((self.path(digest) / "run.json").read_text())
        return doc.get("status") == "failed"

    def save(self, digest: str, run) -> Path:
        """Write a run as the point ``digest``, atomically (replacing an older copy)."""
        final = self.path(digest)
        tmp = Path(tempfile.mkdtemp(dir=self.root, prefix=f".{digest}."))
        try:
            run.save(tmp)
            if final.exists():  # --fresh: the new run replaces the old
                shutil.rmtree(final)
            os.replace(tmp, final)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        return final

    def load(self, digest: str):
        """The stored run of a point."""
        return load_run(self.path(digest))

    def read_comparison(self, digest: str) -> dict | None:
        p = self.path(digest) / "comparison.json"
        return json.loads(p.read_text()) if p.is_file() else None

    def write_comparison(self, digest: str, doc: dict) -> None:
        with atomic_path(self.path(digest) / "comparison.json") as tmp:
            Path(tmp).write_text(json.dumps(doc, indent=1, allow_nan=False))
