"""Per-thread scratch memory for the compiled kernels.

The steady kernels (:mod:`diskfield._rule_jit`, :mod:`diskfield._body_jit`,
:mod:`diskfield._steady_jit`) take their large arrays (node lists, the limits tables) from a
workspace that the caller passes and keeps between calls (:func:`diskfield._rule_jit.carve`).
Fresh memory on every call made the allocator hand pages back to the system and fault them in
again: ~15 % of a 64-walker steady likelihood call on the demo (two rings). Each thread has
its own workspace, so concurrent calls never share one; it grows to what a call reports
needing and is reused from then on.
"""
from __future__ import annotations

import threading

import numpy as np


class _Local(threading.local):
    def __init__(self):
        self.f = np.empty(0)
        self.i = np.empty(0, np.int64)


_LOCAL = _Local()


def call(kernel, *args):
    """``kernel(*args, wsf, wsi, need)`` with this thread's workspace; afterwards the
    workspace grows to the lengths the call wrote into ``need`` (for the next call: a call
    whose workspace was too short allocated what it lacked itself)."""
    need = np.zeros(2, np.int64)
    out = kernel(*args, _LOCAL.f, _LOCAL.i, need)
    if need[0] > _LOCAL.f.size:
        _LOCAL.f = np.empty(int(need[0]) + int(need[0]) // 4)
    if need[1] > _LOCAL.i.size:
        _LOCAL.i = np.empty(int(need[1]) + int(need[1]) // 4, np.int64)
    return out


def size():
    """This thread's workspace lengths (float, int)."""
    return _LOCAL.f.size, _LOCAL.i.size
