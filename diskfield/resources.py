"""Where the shipped data live (installed wheel or source checkout)."""
from __future__ import annotations

from pathlib import Path

__all__ = ["priors_dir", "demo_dir"]

_PKG = Path(__file__).resolve().parent


def _locate(installed: str, source: str) -> Path:
    # A wheel carries the data inside the package; an editable/source checkout has them
    # beside the package at the repository's top level.
    for candidate in (_PKG / installed, _PKG.parent / source):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"diskfield data folder not found (looked for {_PKG / installed} "
                            f"and {_PKG.parent / source}); reinstall the package")


def priors_dir() -> Path:
    """Folder of the shipped prior TOML files."""
    return _locate("_priors", "priors")


def demo_dir() -> Path:
    """Folder of the shipped demo compilation."""
    return _locate("_demo_data", "data_demo")
