"""Batched likelihood calls for dynesty's uniform (multi-ellipsoid) sampler.

dynesty proposes new live points one at a time and calls the likelihood on one point per
call, but ``Model.log_likelihood`` is vectorised: a 32-point call costs a few single-point
calls. dynesty's supported parallel interface is a *pool*: an object with ``map`` and a
``queue_size``; the sampler then fills a queue of ``queue_size`` proposals through
``pool.map(sampler_function, arguments)``, each argument carrying its own random seed.
:class:`BatchedPool` is such a pool that runs in the calling process: for the uniform
sampler (the one dynesty picks below 10 dimensions) it advances all queued proposals in
lockstep and evaluates their candidates in one vectorised likelihood call per round; the
same for the unit-cube sampler dynesty uses before its first bound update.

Each queued proposal draws its candidates from its own generator in the same order as
dynesty's own ``UniformBoundSampler.sample`` and returns the first candidate above the
likelihood threshold, with the same call count, so the run is identical to dynesty's
serial map with the same ``queue_size`` whenever the likelihood of a point does not
depend on the other points of its batch (tests/test_evidence.py checks this). Candidates
drawn after a proposal's accepted one in the same round are evaluated and discarded
(counted in ``n_evaluated``, not in dynesty's call count).

This relies on dynesty internals (``internal_samplers.UniformBoundSampler.sample`` and
``UnitCubeSampler.sample``,
``SamplerArgument``/``SamplerReturn``, ``utils.LoglOutput``), checked for dynesty 3.x at
import: when they are missing :data:`AVAILABLE` is False and :mod:`diskfield.evidence`
runs dynesty's plain one-point path. Any other function handed to ``map`` (other
samplers, bound updates) runs through the built-in ``map``, exactly as without a pool.
"""
from __future__ import annotations

import math
import warnings

import numpy as np

__all__ = ["AVAILABLE", "BatchedPool", "SerialPool", "DEFAULT_BATCH", "DEFAULT_QUEUE"]

#: Target number of points per likelihood call. A 32-point call of the demo models costs
#: ~6-7 single-point calls (benchmarks/bench_compare.py); larger batches gain little.
#: Convention.
DEFAULT_BATCH = 32
#: Proposals queued per refill. A queued proposal was drawn above an older threshold and is
#: discarded when it falls below the current one (~queue/(2 nlive) of them: 8 % at the
#: default 100 live points); bigger queues waste more, smaller ones batch less. Convention.
DEFAULT_QUEUE = 16

try:  # dynesty internals the batching needs (dynesty 3.x); see the module docstring
    import dynesty
    from dynesty.internal_samplers import SamplerReturn, UniformBoundSampler, UnitCubeSampler
    from dynesty.utils import LoglOutput, SamplerHistoryItem, get_random_generator, unitcheck

    AVAILABLE = (int(dynesty.__version__.split(".")[0]) == 3
                 and set(SamplerReturn._fields) >= {"u", "v", "logl", "ncalls",
                                                    "evaluation_history", "tuning_info",
                                                    "proposal_stats"})
except Exception:  # pragma: no cover - other dynesty versions use the plain path
    AVAILABLE = False

# dynesty wants finite log-likelihoods; this is far below any real value.
LOGL_FLOOR = -1e300


def _finite(values):
    values = np.asarray(values, float)
    return np.where(np.isfinite(values), values, LOGL_FLOOR)


class SerialPool:
    """dynesty pool with the built-in ``map`` (the reference path of the batched one)."""

    def __init__(self, queue_size: int = DEFAULT_QUEUE):
        self.size = int(queue_size)

    def map(self, func, iterable):
        return list(map(func, iterable))


class BatchedPool:
    """dynesty pool evaluating the uniform sampler's proposals in vectorised batches.

    Parameters
    ----------
    model : Model
        Provides vectorised ``prior_transform`` and ``log_likelihood``.
    loglike, ptform : callable
        The exact objects handed to dynesty as log-likelihood and prior transform; calls
        whose function wraps them are batched, anything else runs serially.
    batch : int
        Target points per likelihood call.
    queue_size : int
        Proposals per queue refill (dynesty reads it as ``pool.size``).
    """

    def __init__(self, model, loglike, ptform, *, batch: int = DEFAULT_BATCH,
                 queue_size: int = DEFAULT_QUEUE):
        self.model, self.loglike, self.ptform = model, loglike, ptform
        self.batch, self.size = int(batch), int(queue_size)
        self.n_evaluated = 0
        self.n_batches = 0
        self._tried, self._accepted = 0, 0

    # ------------------------------------------------------------ dynesty's map
    def map(self, func, iterable):
        items = list(iterable)
        if not items:
            return []
        draw = _DRAWS.get(func)
        if draw is not None and self._ours(items[0].loglikelihood):
            return self._uniform(items, draw, cube=func is UnitCubeSampler.sample)
        if _unwrap(func) is self.ptform:
            return list(self.model.prior_transform(np.asarray(items, float)))
        if self._ours(func):
            return [LoglOutput(v, False) for v in self._loglike(np.asarray(items, float))]
        return list(map(func, items))

    def _ours(self, func) -> bool:
        return _unwrap(getattr(func, "loglikelihood", None)) is self.loglike

    def _loglike(self, v):
        self.n_evaluated += len(v)
        self.n_batches += 1
        return _finite(self.model.log_likelihood(v))

    # ------------------------------------------------------------ uniform sampler
    def _uniform(self, args, draw, cube):
        """dynesty's uniform samplers (within the bound, or in the whole unit cube before
        the first bound update) for every argument, candidates batched."""
        rngs = [get_random_generator(a.rseed) for a in args]
        done = [None] * len(args)
        calls = [0] * len(args)
        history = [[] for _ in args]
        active = list(range(len(args)))
        while active:
            per = self._per_proposal(len(active))
            owners = [i for i in active for _ in range(per)]
            u = np.array([draw(args[i], rngs[i]) for i in owners])
            v = self.model.prior_transform(u)
            logl = self._loglike(v)
            for k, i in enumerate(owners):
                if done[i] is not None:
                    continue  # drawn after this proposal's accepted candidate: discarded
                out = LoglOutput(float(logl[k]), False)
                calls[i] += 1
                self._tried += 1
                history[i].append(SamplerHistoryItem(u=u[k], v=v[k], logl=out))
                if out > args[i].loglstar:
                    self._accepted += 1
                    done[i] = SamplerReturn(u=u[k], v=v[k], logl=out, ncalls=calls[i],
                                            evaluation_history=history[i], tuning_info=None,
                                            proposal_stats={"n_proposals":
                                                            calls[i] if cube else 0})
            active = [i for i in active if done[i] is None]
        return done


    def _per_proposal(self, n_active):
        """Candidates per active proposal this round: enough to fill a batch, but not much
        more than twice the number the acceptance rate so far says a proposal needs (extra
        candidates only cost time; they never change which candidate is accepted)."""
        fill = math.ceil(self.batch / n_active)
        rate = self._accepted / self._tried if self._tried else 1.0
        need = math.ceil(2.0 / max(rate, 1.0 / self.batch))
        return max(1, min(fill, need))


def _unwrap(func):
    """The user function inside dynesty's ``_function_wrapper`` (or ``func`` itself)."""
    return getattr(func, "func", func)


def _draw_cube(arg, rstate):
    """One candidate, as ``UnitCubeSampler.sample`` draws it."""
    return rstate.uniform(size=arg.kwargs.get("ndim"))


def _draw_bound(arg, rstate):
    """One candidate in the unit cube, as ``UniformBoundSampler.sample`` draws it."""
    kw = arg.kwargs
    bound, ndim, n_cluster = kw["bound"], kw["ndim"], kw.get("n_cluster")
    nonbounded = kw.get("nonbounded")
    if nonbounded is not None:
        nonbounded = nonbounded[:n_cluster]
    tries = 0
    while True:
        u = bound.samples(1, rstate=rstate).flatten()
        if unitcheck(u, nonbounded):
            break
        tries += 1
        if tries == 10000:
            warnings.warn("Ellipsoid sampling is extremely inefficient", RuntimeWarning)
    if n_cluster != ndim:
        u = np.concatenate((u, rstate.uniform(size=(ndim - n_cluster))))
    return u


_DRAWS = ({UniformBoundSampler.sample: _draw_bound, UnitCubeSampler.sample: _draw_cube}
          if AVAILABLE else {})
