"""A cycle counter for timing sections inside numba kernels (a developer's tool, not used
by diskfield itself).

numba has no timer in nopython mode; ``rdtsc()`` reads the CPU's time-stamp counter
through LLVM's ``llvm.readcyclecounter`` intrinsic (~20 cycles per read). To see where a
kernel's time goes, copy its module, add an accumulator argument and wrap sections::

    from benchmarks.cycles import rdtsc      # or copy the intrinsic beside the kernel

    t0 = rdtsc()
    ...                                       # a section
    tc[3] += rdtsc() - t0

then divide the totals by the counter's rate (``python benchmarks/cycles.py`` prints it).
Sections of a few dozen cycles are dominated by the reads themselves; compare sections, and
confirm any change by timing the whole kernel A/B in one process.
"""
from __future__ import annotations

import time

from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic


@intrinsic
def rdtsc(typingctx):
    """The CPU's time-stamp counter (uint64)."""
    sig = types.uint64()

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.IntType(64), [])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.readcyclecounter")
        return builder.call(fn, [])

    return sig, codegen


@njit
def _read():
    return rdtsc()


def rate(seconds=0.2):
    """Counter ticks per second, measured against ``time.perf_counter``."""
    _read()
    c0, t0 = _read(), time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        pass
    return (_read() - c0) / (time.perf_counter() - t0)


if __name__ == "__main__":
    print(f"time-stamp counter: {rate() / 1e9:.3f} GHz")
