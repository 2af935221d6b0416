"""The one place diskfield calls ArviZ.

ArviZ 1.x (Python >= 3.12) changes the API: ``InferenceData`` becomes an
``xarray.DataTree``, ``az.waic`` disappears, and the ``loo`` output is renamed. Every
call therefore lives here, results are read by name (``getattr`` / item access on the
returned object, never by position), and each function returns plain numpy values and
dicts so that nothing outside this module depends on ArviZ types.

Layout of the saved InferenceData (schema version "1"):

* ``posterior``: one variable per sampled parameter, dims ``(chain, draw)`` — each emcee
  walker is a "chain" (a heuristic for R-hat; see :mod:`diskfield.sampling`).
* ``log_likelihood``: variable ``body``, dims ``(chain, draw, body_name)``; the parent
  body is the pointwise unit of PSIS-LOO. (xarray cannot hold a data variable named
  like one of its own dimensions, hence the dimension name ``body_name``.)
* ``sample_stats``: ``lp`` (log posterior) and ``log_likelihood`` (total).
* ``observed_data``: ``ln_value`` (dim ``record``); ``constant_data``: ``ln_err``,
  ``is_limit``, ``body_index`` (dim ``record``).
"""
from __future__ import annotations

import warnings

import numpy as np

from .manifest import atomic_path

__all__ = ["LOG_LIK_VAR", "BODY_DIM", "make_inference_data", "run_attrs", "save_netcdf", "load_netcdf",
           "posterior_arrays", "pointwise_log_likelihood", "psis_loo", "waic", "rhat_ess",
           "pareto_k_threshold"]

LOG_LIK_VAR = "body"
BODY_DIM = "body_name"


def _az():
    import arviz
    if int(arviz.__version__.split(".")[0]) >= 1:  # pragma: no cover - not installable here
        raise ImportError(f"diskfield supports ArviZ 0.23.x (found {arviz.__version__}); "
                          "install 'arviz>=0.23.4,<1'")
    return arviz


def make_inference_data(draws, names, pointwise, *, lp, body_names, observed=None,
                        attrs=None):
    """Build an InferenceData from kept draws.

    Parameters
    ----------
    draws : ndarray, shape (C, D, P)
        Parameter draws (chains = walkers).
    names : sequence of str
        Parameter names, length P.
    pointwise : ndarray, shape (C, D, B)
        Per-body log-likelihood (natural log).
    lp : ndarray, shape (C, D)
        Log posterior of each draw.
    body_names : sequence of str
    observed : dict, optional
        ``record`` (ids), ``ln_value``, ``ln_err``, ``is_limit``, ``body_index`` arrays.
    attrs : dict, optional
        Provenance attributes (str / int / float values).
    """
    az = _az()
    posterior = {name: np.asarray(draws[..., i]) for i, name in enumerate(names)}
    coords = {BODY_DIM: list(body_names)}
    dims = {LOG_LIK_VAR: [BODY_DIM]}
    kwargs = {}
    if observed is not None:
        coords["record"] = [str(r) for r in observed["record"]]
        for key in ("ln_value", "ln_err", "is_limit", "body_index"):
            dims[key] = ["record"]
        kwargs["observed_data"] = {"ln_value": np.asarray(observed["ln_value"], float)}
        kwargs["constant_data"] = {
            "ln_err": np.asarray(observed["ln_err"], float),
            "is_limit": np.asarray(observed["is_limit"], np.int8),
            "body_index": np.asarray(observed["body_index"], np.int64)}
    attrs = _clean_attrs(attrs or {})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # "log_likelihood in sample_stats" deprecation note
        idata = az.from_dict(
            posterior=posterior, log_likelihood={LOG_LIK_VAR: np.asarray(pointwise, float)},
            sample_stats={"lp": np.asarray(lp, float),
                          "log_likelihood": np.asarray(pointwise, float).sum(axis=-1)},
            coords=coords, dims=dims, attrs=attrs, **kwargs)
    # ArviZ 0.23 keeps ``attrs`` at the top level only; readers that open the netCDF
    # posterior group directly (xarray) find the provenance there too.
    idata.posterior.attrs.update(attrs)
    return idata


def run_attrs(idata) -> dict:
    """Provenance attributes of a saved run (top level merged over the posterior group's)."""
    out = dict(idata.posterior.attrs)
    out.update(dict(getattr(idata, "attrs", {}) or {}))
    return out


def _clean_attrs(attrs):
    out = {}
    for key, value in attrs.items():
        if isinstance(value, (bool, np.bool_)):
            value = int(value)
        out[key] = value if isinstance(value, (int, float, str)) else str(value)
    return out


def save_netcdf(idata, path):
    """Write ``idata`` to ``path`` (netCDF4/HDF5 via h5netcdf), atomically."""
    with atomic_path(path) as tmp:
        idata.to_netcdf(str(tmp), engine="h5netcdf")
    return path


def load_netcdf(path):
    """Read a saved InferenceData and load every group into memory (no open file)."""
    idata = _az().from_netcdf(str(path), engine="h5netcdf")
    for group in idata.groups():
        getattr(idata, group).load()
    return idata


def posterior_arrays(idata) -> dict:
    """Posterior draws as ``{name: ndarray (chain, draw)}``."""
    return {name: np.asarray(var.values) for name, var in idata.posterior.data_vars.items()}


def pointwise_log_likelihood(idata) -> np.ndarray:
    """Per-body log-likelihood as (chain, draw, body)."""
    return np.asarray(idata.log_likelihood[LOG_LIK_VAR].values)


def pareto_k_threshold(n_draws: int) -> float:
    """Sample-size-dependent Pareto-k threshold min(1 − 1/log10 S, 0.7).

    Vehtari et al. (2024, JMLR 25, "Pareto smoothed importance sampling"); the
    fixed 0.7 is Vehtari, Gelman & Gabry (2017, Stat. Comput. 27, 1413).
    """
    return float(min(1.0 - 1.0 / np.log10(max(n_draws, 11)), 0.7))


def psis_loo(idata) -> dict:
    """PSIS-LOO with the parent body as the unit.

    Returns
    -------
    dict
        ``elpd_loo``, ``se``, ``p_loo`` (floats, natural-log scale, higher elpd is
        better), ``elpd_i`` and ``pareto_k`` (ndarray per body), ``warning`` (bool).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the high-k warning is reported as a flag instead
        res = _az().loo(idata, pointwise=True, var_name=LOG_LIK_VAR, scale="log")
    return {"elpd_loo": float(res["elpd_loo"]), "se": float(res["se"]),
            "p_loo": float(res["p_loo"]), "elpd_i": np.asarray(res["loo_i"]).ravel(),
            "pareto_k": np.asarray(res["pareto_k"]).ravel(), "warning": bool(res["warning"])}


def waic(idata) -> dict:
    """WAIC (Watanabe 2010, JMLR 11, 3571) on the elpd scale, per body.

    Returns
    -------
    dict
        ``elpd_waic``, ``se``, ``p_waic``, ``elpd_i`` (per body), ``warning``.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = _az().waic(idata, pointwise=True, var_name=LOG_LIK_VAR, scale="log")
    return {"elpd_waic": float(res["elpd_waic"]), "se": float(res["se"]),
            "p_waic": float(res["p_waic"]), "elpd_i": np.asarray(res["waic_i"]).ravel(),
            "warning": bool(res["warning"])}


def rhat_ess(idata) -> dict:
    """Rank-normalised split R-hat and bulk ESS per parameter (Vehtari et al. 2021).

    Returns
    -------
    dict
        ``{name: (rhat, ess_bulk)}``.
    """
    az = _az()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rhat = az.rhat(idata.posterior)
        ess = az.ess(idata.posterior, method="bulk")
    return {name: (float(rhat[name].values), float(ess[name].values))
            for name in idata.posterior.data_vars}
