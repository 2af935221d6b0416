"""Campaign problems over the disk-field model (SBC and verdict problems, see ``calibration``).

A :class:`DiskSpec` carries everything a worker needs as plain text — the compilation file and
every prior file read, shipped ones included — so a task gives the same result on any worker
of any cluster, whatever prior files that worker's installation ships. Workers rebuild the
model once per specification and keep it in a per-process cache.
"""
from __future__ import annotations

import dataclasses
import hashlib
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..manifest import write_atomic
from ..sampling import SamplerSettings

__all__ = ["DiskSpec", "EvidenceSettings", "DiskSBCProblem", "DiskVerdictProblem",
           "make_spec", "spec_model", "flat_draws", "two_ln_bayes_factor"]

_CACHE: dict = {}


@dataclass(frozen=True)
class DiskSpec:
    """A compilation, its priors and a model choice, as plain text (picklable, hashable).

    Attributes
    ----------
    compilation_name : str
        File name of the compilation (its suffix selects ECSV or CSV).
    compilation_text : str
        The file's content.
    prior_files : tuple of (str, str)
        (file name, content) of every prior file read, in order (shipped ones first).
    profile, envelope, spin : str
        Model choice (see ``diskfield profiles``).
    """

    compilation_name: str
    compilation_text: str
    prior_files: tuple
    profile: str
    envelope: str = "steady"
    spin: str = "body"

    def key(self) -> str:
        """SHA-256 of the specification (cache key)."""
        blob = repr(dataclasses.astuple(self)).encode("utf-8")
        return hashlib.sha256(blob).hexdigest()

    def with_profile(self, profile: str) -> "DiskSpec":
        return dataclasses.replace(self, profile=profile)


@dataclass(frozen=True)
class EvidenceSettings:
    """Nested-sampling settings of campaign evidences (live points; stopping ln Z remainder)."""

    nlive: int = 100
    dlogz: float = 0.5


def make_spec(compilation_path, profile: str, envelope: str = "steady", spin: str = "body",
              priors=None) -> DiskSpec:
    """Read a compilation and prior files into a :class:`DiskSpec` (validating both).

    Parameters
    ----------
    compilation_path : path
        ECSV or CSV compilation.
    profile, envelope, spin : str
    priors : path or list of paths, optional
        The user's prior files (on top of the shipped ones).

    Raises
    ------
    CompilationError, PriorFileError, OptionError
        As the reader, the prior loader and ``build_model`` raise them.
    """
    from ..likelihood import build_model
    from ..priorset import load_priors
    from ..records import read_compilation

    path = Path(compilation_path)
    comp = read_compilation(path)
    priorset = load_priors(priors)
    build_model(comp, profile=profile, envelope=envelope, spin=spin, priors=priorset)
    files = tuple((Path(f).name, Path(f).read_bytes().decode("utf-8")) for f in priorset.files)
    # Bytes decoded without newline translation: the text hashes like the file itself.
    return DiskSpec(path.name, path.read_bytes().decode("utf-8"), files, profile, envelope, spin)


def _materialise(spec: DiskSpec):
    """(compilation, priorset) of a spec, written to a per-spec temporary folder once."""
    from ..priorset import load_priors
    from ..records import read_compilation

    folder = Path(tempfile.gettempdir()) / f"diskfield-campaign-{spec.key()[:16]}"
    folder.mkdir(parents=True, exist_ok=True)
    # Atomic writes: two worker processes on one host may materialise the same spec at once.
    comp_path = write_atomic(folder / spec.compilation_name, spec.compilation_text)
    prior_paths = [write_atomic(folder / f"{k:02d}_{name}", text)
                   for k, (name, text) in enumerate(spec.prior_files)]
    return read_compilation(comp_path), load_priors(prior_paths or None)


def spec_model(spec: DiskSpec):
    """(compilation, priorset, model) of a spec, cached per worker process."""
    from ..likelihood import build_model

    key = spec.key()
    if key not in _CACHE:
        comp, priorset = _materialise(spec)
        model = build_model(comp, profile=spec.profile, envelope=spec.envelope, spin=spec.spin,
                            priors=priorset)
        _CACHE[key] = (comp, priorset, model)
    return _CACHE[key]


def _refit_model(spec: DiskSpec, comp, priorset):
    from ..likelihood import build_model

    return build_model(comp, profile=spec.profile, envelope=spec.envelope, spin=spec.spin,
                       priors=priorset)


def _seed(rng: np.random.Generator) -> int:
    return int(rng.integers(2**31 - 1))


def flat_draws(run, n_draws: int, rng: np.random.Generator) -> tuple[np.ndarray, bool]:
    """``n_draws`` kept draws of an emcee run (without replacement when there are enough).

    Returns the draws (n_draws, P) and whether there were enough distinct draws.
    """
    flat = run.draws().reshape(-1, run.chain.shape[-1])
    enough = flat.shape[0] >= n_draws
    pick = rng.choice(flat.shape[0], size=n_draws, replace=not enough)
    return flat[pick], enough


def _diagnostics(run, enough: bool) -> dict:
    return {"converged": bool(run.converged), "flags": list(run.flags),
            "n_steps": int(run.n_steps), "tau_max": float(np.max(run.tau)),
            "chain_over_tau": float(run.chain_over_tau), "enough_draws": bool(enough)}


@dataclass(frozen=True)
class DiskSBCProblem:
    """SBC of one disk model on the design of the user's compilation.

    Attributes
    ----------
    spec : DiskSpec
    sampler : SamplerSettings
        emcee settings of each fit (a step limit keeps campaigns affordable; unconverged fits
        are kept and counted).
    """

    spec: DiskSpec
    sampler: SamplerSettings = SamplerSettings()

    @property
    def parameter_names(self) -> tuple:
        return tuple(spec_model(self.spec)[2].parameter_names)

    def draw_truth(self, rng: np.random.Generator) -> np.ndarray:
        model = spec_model(self.spec)[2]
        return np.asarray(model.prior_transform(rng.uniform(size=len(model.parameter_names))))

    def simulate(self, theta, rng: np.random.Generator):
        from ..simulate import simulate_compilation

        comp, _, model = spec_model(self.spec)
        return simulate_compilation(comp, model, theta, rng)

    def posterior_draws(self, data, rng: np.random.Generator, n_draws: int):
        from ..sampling import run_sampler

        model = _refit_model(self.spec, data, spec_model(self.spec)[1])
        run = run_sampler(model, seed=_seed(rng), settings=self.sampler)
        draws, enough = flat_draws(run, n_draws, rng)
        return draws, _diagnostics(run, enough)


@dataclass(frozen=True)
class DiskVerdictProblem:
    """Verdict rates of ``alternative`` (e.g. ring) against ``null`` (e.g. smooth) by 2 ln B.

    Attributes
    ----------
    null, alternative : DiskSpec
        Same compilation and priors, different profiles.
    evidence : EvidenceSettings
    """

    null: DiskSpec
    alternative: DiskSpec
    evidence: EvidenceSettings = EvidenceSettings()

    @property
    def model_names(self) -> tuple[str, str]:
        return (self.null.profile, self.alternative.profile)

    def simulate_from(self, model_name: str, rng: np.random.Generator):
        from ..simulate import simulate_compilation

        spec = self.null if model_name == self.null.profile else self.alternative
        comp, _, model = spec_model(spec)
        theta = np.asarray(model.prior_transform(rng.uniform(size=len(model.parameter_names))))
        data = simulate_compilation(comp, model, theta, rng)
        return data, dict(zip(model.parameter_names, theta.tolist()))

    def two_ln_bayes_factor(self, data, rng: np.random.Generator):
        return two_ln_bayes_factor(self.null, self.alternative, data, rng, self.evidence)


def two_ln_bayes_factor(null: DiskSpec, alternative: DiskSpec, data, rng, settings):
    """2 ln B of ``alternative`` over ``null`` on ``data`` and its error (dynesty's, combined)."""
    from ..evidence import nested_evidence

    out = []
    for spec in (null, alternative):
        model = _refit_model(spec, data, spec_model(spec)[1])
        out.append(nested_evidence(model, seed=_seed(rng), nlive=settings.nlive,
                                   dlogz=settings.dlogz))
    value = 2.0 * (out[1].ln_evidence - out[0].ln_evidence)
    return value, 2.0 * float(np.hypot(out[0].ln_evidence_err, out[1].ln_evidence_err))
