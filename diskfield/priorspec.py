"""Prior families (small objects) and the prior set read from TOML files.

Each prior has ``log_prob(x)``, ``ppf(u)`` (unit cube -> value), ``sample(rng, size)``
and ``support``, so emcee initialisation, nested sampling and simulation share one object.
Values are in the prior's declared unit (after conversion to diskfield's internal units:
uT, Myr, AU) — conversion happens when a file is read, never here.

Families (closed list, DESIGN §4): uniform, log_uniform, normal, truncated_normal,
half_normal, log_normal, fixed.
"""
from __future__ import annotations

import numpy as np
from scipy import special, stats

__all__ = [
    "Prior",
    "Uniform",
    "LogUniform",
    "Normal",
    "TruncatedNormal",
    "HalfNormal",
    "LogNormal",
    "Fixed",
    "FAMILIES",
    "make_prior",
]


class Prior:
    """Base class: a one-dimensional prior distribution.

    Subclasses implement ``_logpdf``, ``ppf`` and ``support``; ``log_prob`` returns
    ``-inf`` (never NaN) outside the support.
    """

    family: str = ""
    unit: str = ""
    source: str = ""

    @property
    def support(self) -> tuple[float, float]:
        raise NotImplementedError

    @property
    def is_fixed(self) -> bool:
        return False

    def log_prob(self, x):
        """Log density at ``x`` (array-like); ``-inf`` outside the support."""
        x = np.asarray(x, dtype=float)
        lo, hi = self.support
        inside = np.isfinite(x) & (x >= lo) & (x <= hi)
        if inside.all():  # the common case (every walker inside): no masked copy
            out = np.asarray(self._logpdf(x), dtype=float)
            return out if out.ndim else float(out)
        out = np.full(x.shape, -np.inf)
        if np.any(inside):
            out[inside] = self._logpdf(x[inside])
        return out if out.ndim else float(out)

    def ppf(self, u):
        """Inverse CDF: maps ``u`` in [0, 1] to a value."""
        raise NotImplementedError

    def cdf(self, x):
        raise NotImplementedError

    def sample(self, rng: np.random.Generator, size=None):
        """Draw ``size`` values with the numpy Generator ``rng``."""
        return self.ppf(rng.uniform(size=size))

    def _logpdf(self, x):
        raise NotImplementedError

    def describe(self) -> str:
        """Short human-readable form, e.g. ``uniform(3, 7) AU``."""
        args = ", ".join(f"{v:g}" for v in self._args())
        unit = f" {self.unit}" if self.unit else ""
        return f"{self.family}({args}){unit}"

    def _args(self) -> tuple[float, ...]:
        return ()

    def as_dict(self) -> dict:
        """Serialisable description (for manifests and reports)."""
        d = {"family": self.family, **{k: float(v) for k, v in self._named_args().items()}}
        if self.unit:
            d["unit"] = self.unit
        if self.source:
            d["source"] = self.source
        return d

    def _named_args(self) -> dict:
        return {}


class Uniform(Prior):
    family = "uniform"

    def __init__(self, low, high, unit="", source=""):
        if not (np.isfinite(low) and np.isfinite(high) and high > low):
            raise ValueError(f"uniform prior needs finite low < high; got low={low}, high={high}")
        self.low, self.high, self.unit, self.source = float(low), float(high), unit, source

    @property
    def support(self):
        return (self.low, self.high)

    def _logpdf(self, x):
        return np.full(x.shape, -np.log(self.high - self.low))

    def ppf(self, u):
        return self.low + (self.high - self.low) * np.asarray(u, dtype=float)

    def cdf(self, x):
        return np.clip((np.asarray(x, float) - self.low) / (self.high - self.low), 0.0, 1.0)

    def _named_args(self):
        return {"low": self.low, "high": self.high}

    def _args(self):
        return (self.low, self.high)


class LogUniform(Prior):
    family = "log_uniform"

    def __init__(self, low, high, unit="", source=""):
        if not (np.isfinite(low) and np.isfinite(high) and 0 < low < high):
            raise ValueError(f"log_uniform prior needs 0 < low < high; got low={low}, high={high}")
        self.low, self.high, self.unit, self.source = float(low), float(high), unit, source
        self._span = np.log(self.high / self.low)

    @property
    def support(self):
        return (self.low, self.high)

    def _logpdf(self, x):
        return -np.log(x) - np.log(self._span)

    def ppf(self, u):
        return self.low * np.exp(self._span * np.asarray(u, dtype=float))

    def cdf(self, x):
        x = np.clip(np.asarray(x, float), self.low, self.high)
        return np.log(x / self.low) / self._span

    def _named_args(self):
        return {"low": self.low, "high": self.high}

    def _args(self):
        return (self.low, self.high)


class Normal(Prior):
    family = "normal"

    def __init__(self, mean, sd, unit="", source=""):
        if not (np.isfinite(mean) and np.isfinite(sd) and sd > 0):
            raise ValueError(f"normal prior needs finite mean and sd > 0; got mean={mean}, sd={sd}")
        self.mean, self.sd, self.unit, self.source = float(mean), float(sd), unit, source

    @property
    def support(self):
        return (-np.inf, np.inf)

    def _logpdf(self, x):
        z = (x - self.mean) / self.sd
        return -0.5 * z * z - np.log(self.sd) - 0.5 * np.log(2 * np.pi)

    def ppf(self, u):
        return self.mean + self.sd * special.ndtri(np.asarray(u, dtype=float))

    def cdf(self, x):
        return special.ndtr((np.asarray(x, float) - self.mean) / self.sd)

    def _named_args(self):
        return {"mean": self.mean, "sd": self.sd}

    def _args(self):
        return (self.mean, self.sd)


class TruncatedNormal(Prior):
    family = "truncated_normal"

    def __init__(self, mean, sd, low, high, unit="", source=""):
        if not (np.isfinite(mean) and np.isfinite(sd) and sd > 0 and low < high):
            raise ValueError(
                f"truncated_normal prior needs sd > 0 and low < high; got mean={mean}, sd={sd}, "
                f"low={low}, high={high}")
        self.mean, self.sd, self.low, self.high = float(mean), float(sd), float(low), float(high)
        self.unit, self.source = unit, source
        self._dist = stats.truncnorm((self.low - self.mean) / self.sd,
                                     (self.high - self.mean) / self.sd, loc=self.mean, scale=self.sd)
        self._lognorm = float(np.log(special.ndtr((self.high - self.mean) / self.sd)
                                     - special.ndtr((self.low - self.mean) / self.sd)))
        if not np.isfinite(self._lognorm):
            raise ValueError(
                f"truncated_normal prior has no mass between low={low} and high={high} "
                f"for mean={mean}, sd={sd}")

    @property
    def support(self):
        return (self.low, self.high)

    def _logpdf(self, x):
        z = (x - self.mean) / self.sd
        return -0.5 * z * z - np.log(self.sd) - 0.5 * np.log(2 * np.pi) - self._lognorm

    def ppf(self, u):
        return self._dist.ppf(np.asarray(u, dtype=float))

    def cdf(self, x):
        return self._dist.cdf(np.asarray(x, float))

    def _named_args(self):
        return {"mean": self.mean, "sd": self.sd, "low": self.low, "high": self.high}

    def _args(self):
        return (self.mean, self.sd, self.low, self.high)


class HalfNormal(Prior):
    family = "half_normal"

    def __init__(self, scale, high=np.inf, unit="", source=""):
        if not (np.isfinite(scale) and scale > 0 and high > 0):
            raise ValueError(f"half_normal prior needs scale > 0 and high > 0; got scale={scale}, high={high}")
        self.scale, self.high, self.unit, self.source = float(scale), float(high), unit, source
        self._lognorm = float(np.log(2 * special.ndtr(self.high / self.scale) - 1))

    @property
    def support(self):
        return (0.0, self.high)

    def _logpdf(self, x):
        z = x / self.scale
        return -0.5 * z * z + np.log(2.0 / self.scale) - 0.5 * np.log(2 * np.pi) - self._lognorm

    def ppf(self, u):
        u = np.asarray(u, dtype=float)
        top = 2 * special.ndtr(self.high / self.scale) - 1
        return self.scale * special.ndtri(0.5 + 0.5 * u * top)

    def cdf(self, x):
        x = np.clip(np.asarray(x, float), 0, self.high)
        return (2 * special.ndtr(x / self.scale) - 1) / np.exp(self._lognorm)

    def _named_args(self):
        d = {"scale": self.scale}
        if np.isfinite(self.high):
            d["high"] = self.high
        return d

    def _args(self):
        return tuple(self._named_args().values())


class LogNormal(Prior):
    """ln(x) ~ Normal(ln(median), ln_sd^2)."""

    family = "log_normal"

    def __init__(self, median, ln_sd, unit="", source=""):
        if not (np.isfinite(median) and median > 0 and np.isfinite(ln_sd) and ln_sd > 0):
            raise ValueError(f"log_normal prior needs median > 0 and ln_sd > 0; got median={median}, ln_sd={ln_sd}")
        self.median, self.ln_sd, self.unit, self.source = float(median), float(ln_sd), unit, source
        self._mu = np.log(self.median)

    @property
    def support(self):
        return (0.0, np.inf)

    def log_prob(self, x):
        x = np.asarray(x, dtype=float)
        out = np.full(x.shape, -np.inf)
        ok = np.isfinite(x) & (x > 0)
        out[ok] = self._logpdf(x[ok])
        return out if out.ndim else float(out)

    def _logpdf(self, x):
        z = (np.log(x) - self._mu) / self.ln_sd
        return -0.5 * z * z - np.log(x * self.ln_sd) - 0.5 * np.log(2 * np.pi)

    def ppf(self, u):
        return np.exp(self._mu + self.ln_sd * special.ndtri(np.asarray(u, dtype=float)))

    def cdf(self, x):
        x = np.asarray(x, float)
        with np.errstate(divide="ignore"):
            return special.ndtr((np.log(np.maximum(x, 0)) - self._mu) / self.ln_sd)

    def _named_args(self):
        return {"median": self.median, "ln_sd": self.ln_sd}

    def _args(self):
        return (self.median, self.ln_sd)


class Fixed(Prior):
    """A fixed value: removes the parameter from the sampled set."""

    family = "fixed"

    def __init__(self, value, unit="", source=""):
        if not np.isfinite(value):
            raise ValueError(f"fixed prior needs a finite value; got {value}")
        self.value, self.unit, self.source = float(value), unit, source

    @property
    def support(self):
        return (self.value, self.value)

    @property
    def is_fixed(self):
        return True

    def _logpdf(self, x):
        return np.zeros(x.shape)

    def ppf(self, u):
        return np.full(np.shape(u), self.value) if np.ndim(u) else self.value

    def cdf(self, x):
        return (np.asarray(x, float) >= self.value).astype(float)

    def _named_args(self):
        return {"value": self.value}

    def _args(self):
        return (self.value,)


#: family name -> (class, required keys, optional keys)
FAMILIES: dict[str, tuple[type, tuple[str, ...], tuple[str, ...]]] = {
    "uniform": (Uniform, ("low", "high"), ()),
    "log_uniform": (LogUniform, ("low", "high"), ()),
    "normal": (Normal, ("mean", "sd"), ()),
    "truncated_normal": (TruncatedNormal, ("mean", "sd", "low", "high"), ()),
    "half_normal": (HalfNormal, ("scale",), ("high",)),
    "log_normal": (LogNormal, ("median", "ln_sd"), ()),
    "fixed": (Fixed, ("value",), ()),
}


def make_prior(family: str, unit: str = "", source: str = "", **kwargs) -> Prior:
    """Build a prior from its family name and numeric arguments (already in internal units).

    Raises ``ValueError`` naming the family and what is valid when the family is unknown,
    a key is missing or unknown, or values are impossible.
    """
    if family not in FAMILIES:
        raise ValueError(f"unknown family {family!r}; valid: {', '.join(FAMILIES)}")
    cls, required, optional = FAMILIES[family]
    missing = [k for k in required if k not in kwargs]
    unknown = [k for k in kwargs if k not in required + optional]
    if missing or unknown:
        parts = []
        if missing:
            parts.append(f"missing {', '.join(missing)}")
        if unknown:
            parts.append(f"unknown key(s) {', '.join(unknown)}")
        raise ValueError(f"{family} prior: {'; '.join(parts)}; "
                         f"valid keys: {', '.join(required + optional)}")
    return cls(**{k: float(v) for k, v in kwargs.items()}, unit=unit, source=source)
