"""Shared test fixtures: one seed helper for the whole suite and small compilations."""
from __future__ import annotations

import zlib
from pathlib import Path

import numpy as np
import pytest

#: The suite's base seed (a convention); every test derives its own from it.
PROJECT_SEED = 20261202

DATA_DIR = Path(__file__).resolve().parent / "data"


def seed_for(*names: object) -> int:
    """A stable 32-bit seed for a test, from the project seed and any names.

    Parameters
    ----------
    *names : object
        Anything identifying the use (test id, case label); joined with ``str``.

    Returns
    -------
    int
        A seed in [0, 2**32), the same on every machine and run.
    """
    label = "/".join(str(n) for n in names).encode("utf-8")
    return (PROJECT_SEED + zlib.crc32(label)) % 2**32


@pytest.fixture
def rng(request) -> np.random.Generator:
    """A numpy Generator seeded from the test's node id (stable across runs)."""
    return np.random.default_rng(seed_for(request.node.nodeid))


@pytest.fixture
def small_compilation_path() -> Path:
    """A seven-row invented compilation (three bodies, NC/CC/CC_distal, one exclusion)."""
    return DATA_DIR / "small.csv"


@pytest.fixture
def small_compilation(small_compilation_path):
    """``small.csv`` read with the default reservoirs NC, CC, CC_distal."""
    from diskfield.records import read_compilation

    return read_compilation(small_compilation_path,
                            known_reservoirs=("NC", "CC", "CC_distal"))
