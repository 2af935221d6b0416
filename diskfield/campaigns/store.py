"""A campaign's results on disk: one small JSON file per finished task, written atomically.

Layout of a campaign folder::

    campaign.json          kind, configuration fingerprint, seed, created time
    tasks/<task_id>.json   one per finished task (written to a temporary file, then os.replace)
    failed/<task_id>.json  one per task that failed after its retries (removed on later success)

A task file appears only once its result is complete, so a campaign killed at any moment
leaves a consistent folder: ``--resume`` reruns exactly the tasks without a file in ``tasks/``.
JSON (not pickle) keeps the archive readable after refactors.
"""
from __future__ import annotations

import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from ..errors import CheckpointError

__all__ = ["ResultStore", "to_jsonable"]

_SCHEMA_VERSION = "1"


def to_jsonable(value):
    """Convert numpy scalars/arrays (nested in dicts, lists, tuples) to plain JSON types.

    Non-finite floats become ``None`` so that the files stay strict JSON.
    """
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if np.isfinite(value) else None
    return value


def _write_json_atomic(path: Path, payload: dict) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(to_jsonable(payload), fh, indent=1, allow_nan=False)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


class ResultStore:
    """The results folder of one campaign.

    Parameters
    ----------
    root : str or os.PathLike
        Campaign folder (created if missing).
    kind : str
        Campaign kind (``"calibration"``, ``"forecast"``, ...), recorded and checked on resume.
    fingerprint : str
        Hash of everything that determines the tasks' results except their number; a resumed
        campaign must have the same fingerprint.
    seed : int
        Campaign seed (per-task seeds are spawned from it).
    resume : bool
        False: the folder must not already hold a campaign. True: continue the one it holds
        (or start a new one if it holds none).
    """

    def __init__(self, root, kind: str, fingerprint: str, seed: int, *, resume: bool = False):
        self.root = Path(root)
        self.kind, self.fingerprint, self.seed = kind, fingerprint, int(seed)
        self._open(resume)

    @property
    def tasks_dir(self) -> Path:
        return self.root / "tasks"

    @property
    def failed_dir(self) -> Path:
        return self.root / "failed"

    def _open(self, resume: bool) -> None:
        header = self.root / "campaign.json"
        # A header without any result (e.g. the cluster never came up) holds nothing to lose.
        if header.exists() and (self.finished_ids() or self.failures() or resume):
            if not resume:
                raise CheckpointError(
                    f"{self.root}: folder already holds a campaign; pass --resume to continue it "
                    "or choose another --out")
            self._check_header(header)
            return
        _write_json_atomic(header, {
            "schema_version": _SCHEMA_VERSION, "kind": self.kind, "fingerprint": self.fingerprint,
            "seed": self.seed, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")})

    def _check_header(self, header: Path) -> None:
        try:
            saved = json.loads(header.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as err:
            raise CheckpointError(f"{header}: unreadable campaign header ({err})") from None
        for key in ("kind", "fingerprint", "seed"):
            if saved.get(key) != getattr(self, key):
                raise CheckpointError(
                    f"{header}: cannot resume: {key} is {saved.get(key)!r} in the folder but "
                    f"{getattr(self, key)!r} now; resume with the same file, model, priors, "
                    "settings and --seed, or choose another --out")

    def finished_ids(self) -> set[str]:
        """Ids of tasks whose result file exists."""
        if not self.tasks_dir.is_dir():
            return set()
        return {p.stem for p in self.tasks_dir.glob("*.json")}

    def write_result(self, task_id: str, result: dict) -> None:
        """Store a finished task's result (atomically) and clear any earlier failure."""
        _write_json_atomic(self.tasks_dir / f"{task_id}.json", {"task_id": task_id, **result})
        (self.failed_dir / f"{task_id}.json").unlink(missing_ok=True)

    def write_failure(self, task_id: str, failure: dict) -> None:
        """Store a task's final failure (after retries)."""
        _write_json_atomic(self.failed_dir / f"{task_id}.json", {"task_id": task_id, **failure})

    def results(self) -> list[dict]:
        """Every finished task's result, sorted by task id."""
        return [self._read(p) for p in sorted(self.tasks_dir.glob("*.json"))]

    def failures(self) -> list[dict]:
        """Every task failure on record, sorted by task id."""
        if not self.failed_dir.is_dir():
            return []
        return [self._read(p) for p in sorted(self.failed_dir.glob("*.json"))]

    @staticmethod
    def _read(path: Path) -> dict:
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as err:
            raise CheckpointError(f"{path}: unreadable task result ({err}); delete the file "
                                  "and resume to recompute that task") from None
