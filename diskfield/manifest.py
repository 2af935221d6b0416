"""Provenance of an output folder (``manifest.json``) and atomic file writes.

Every file diskfield writes goes through :func:`write_atomic`: the bytes land in a
temporary file in the same folder, are flushed to disk, and then replace the target with
``os.replace`` (atomic on POSIX and Windows), so a kill leaves either the old file or the
new one, never a truncated one.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import importlib.metadata
import json
import os
import platform
import shlex
import sys
import tempfile
from pathlib import Path

__all__ = ["write_atomic", "atomic_path", "sha256_file", "package_versions",
           "build_manifest", "write_manifest", "utc_now"]

_PACKAGES = ("numpy", "scipy", "numba", "emcee", "arviz", "dynesty", "astropy", "h5py",
             "diskfield")


def write_atomic(path, data) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file + ``os.replace``).

    Parameters
    ----------
    path : str or os.PathLike
        Target file; its folder is created if missing.
    data : str or bytes
        Content; text is encoded as UTF-8.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    path = Path(path)
    payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
    return path


class atomic_path:
    """Context manager giving a temporary path that replaces ``path`` on success.

    For writers that need a file name (h5py, netCDF, astropy): write to the yielded
    path; on a clean exit it is moved over ``path`` with ``os.replace``; on an exception
    it is removed and ``path`` is left untouched.
    """

    def __init__(self, path):
        self.path = Path(path)

    def __enter__(self) -> Path:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".tmp",
                                   dir=self.path.parent)
        os.close(fd)
        self.tmp = Path(tmp)
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            # mkstemp makes the file private (0600); give results the permissions any
            # ordinary new file would have, so collaborators can read an output folder.
            os.chmod(self.tmp, 0o666 & ~_umask())
            os.replace(self.tmp, self.path)
        else:
            self.tmp.unlink(missing_ok=True)
        return False


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def sha256_file(path) -> str:
    """SHA-256 hex digest of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def package_versions() -> dict:
    """Versions of Python and of the numerical packages diskfield depends on."""
    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def utc_now() -> str:
    """Current UTC time, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()


def build_manifest(out_dir, *, data_hash="", prior_files=(), seed=None, argv=None,
                   extra=None) -> dict:
    """Describe an output folder: versions, data hash, priors, seed, command, files.

    Parameters
    ----------
    out_dir : str or os.PathLike
        The folder; every file under it (except ``manifest.json`` and temporary files)
        is listed with its SHA-256.
    data_hash : str
        SHA-256 of the compilation file read.
    prior_files : sequence of path
        Prior files read, in order.
    seed : int or None
        The random seed used.
    argv : sequence of str, optional
        Command line (default ``sys.argv``).
    extra : dict, optional
        Further entries merged in at top level.
    """
    out_dir = Path(out_dir)
    argv = list(sys.argv if argv is None else argv)
    files = sorted(p for p in out_dir.rglob("*")
                   if p.is_file() and p.name != "manifest.json" and not p.name.endswith(".tmp"))
    manifest = {
        "schema_version": "1",
        "created": utc_now(),
        "versions": package_versions(),
        "data_hash": data_hash,
        "prior_files": [{"path": str(p), "sha256": sha256_file(p)} for p in prior_files
                        if Path(p).is_file()],
        "seed": seed,
        "command_line": " ".join(shlex.quote(a) for a in argv),
        "files": [{"path": str(p.relative_to(out_dir)), "sha256": sha256_file(p)}
                  for p in files],
    }
    manifest.update(extra or {})
    return manifest


def write_manifest(out_dir, **kwargs) -> Path:
    """Build the manifest of ``out_dir`` (see :func:`build_manifest`) and write it atomically."""
    manifest = build_manifest(out_dir, **kwargs)
    return write_atomic(Path(out_dir) / "manifest.json", json.dumps(manifest, indent=2) + "\n")
