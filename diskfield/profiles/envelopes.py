"""Temporal envelopes T(t): ``steady``, ``dissipating`` and ``viscous``.

Every envelope is normalised to T(0) = 1 at CAI formation, so ``field_1au`` is the field at
1 AU at t = 0 (for ``steady``, at all times). Times before CAI formation (t < 0, reachable by
the tails of a Gaussian age prior) are treated as t = 0: the model starts at CAI formation.
"""
from __future__ import annotations

import numpy as np

from .base import Envelope, Parameter

__all__ = ["STEADY", "DISSIPATING", "VISCOUS"]


def _log_steady(t_myr, p):
    """ln T of the steady envelope.

    Notes
    -----
    T(t) = 1.
    """
    return np.zeros(np.shape(t_myr))


def _log_dissipating(t_myr, p):
    """ln T of the dissipating envelope.

    Notes
    -----
    With s(t) = sigma((t_d - t) / dt) / sigma(t_d / dt), sigma the logistic function,
    T(t) = f_r + (1 - f_r) s(t), where t_d = ``dissipation_time``, dt = ``dissipation_edge``
    and f_r = ``residual_fraction``. The division by sigma(t_d / dt) makes T(0) = 1 exactly;
    T falls from 1 to f_r over about 4 dt around t_d (10 % to 90 % of the drop in 4.4 dt).
    Evaluated as s = (1 + e^(-t_d/dt)) / (1 + e^((t - t_d)/dt)), which lies in [0, 1] for
    t >= 0 (far past t_d the exp overflows to inf and s is 0: T = f_r, whose ln is finite
    for f_r > 0), then ln T = ln(f_r + (1 - f_r) s): the same values as the form in logs to
    ~2e-15, five times faster (the age rule evaluates it at every age node).
    """
    t = np.maximum(t_myr, 0.0)
    t_d, dt, f_r = p["dissipation_time"], p["dissipation_edge"], p["residual_fraction"]
    with np.errstate(over="ignore"):
        s = (1.0 + np.exp(-t_d / dt)) / (1.0 + np.exp((t - t_d) / dt))
    return np.log(f_r + (1.0 - f_r) * s)


def _log_viscous(t_myr, p):
    """ln T of the viscous envelope.

    Notes
    -----
    T(t) = (1 + t / t_s)^(-eta / 2), t_s = ``viscous_time``, eta = ``viscous_eta``: the
    viscous similarity solution has Mdot ~ (1 + t/t_s)^(-eta) (Lynden-Bell & Pringle 1974;
    Hartmann et al. 1998, ApJ 495, 385) and the accretion-driven field B ~ Mdot^(1/2).
    """
    t = np.maximum(t_myr, 0.0)
    return -0.5 * p["viscous_eta"] * np.log1p(t / p["viscous_time"])


STEADY = Envelope(
    name="steady",
    description="field constant in time",
    parameters=(),
    log_factor=_log_steady,
    formula="T(t) = 1",
)

DISSIPATING = Envelope(
    name="dissipating",
    description="field constant until a dissipation time, then a logistic fall to a residual",
    parameters=(
        Parameter("dissipation_time", "Myr", "time t_d of the mid-point of the field's "
                  "decline, after CAI formation", domain=(0.0, np.inf)),
        Parameter("dissipation_edge", "Myr", "e-folding width dt of the logistic decline",
                  domain=(0.0, np.inf)),
        Parameter("residual_fraction", "", "field left after dissipation, as a fraction "
                  "f_r of the initial field", domain=(0.0, 1.0)),
    ),
    log_factor=_log_dissipating,
    formula=("T(t) = f_r + (1 - f_r) * sigma((t_d - t)/dt) / sigma(t_d/dt), sigma(x) = "
             "1/(1 + exp(-x)); t_d = dissipation_time, dt = dissipation_edge, "
             "f_r = residual_fraction"),
)

VISCOUS = Envelope(
    name="viscous",
    description="field following the accretion rate of a viscous similarity solution",
    parameters=(
        Parameter("viscous_time", "Myr", "viscous time scale t_s of the similarity solution",
                  domain=(0.0, np.inf)),
        Parameter("viscous_eta", "", "decline exponent eta of the accretion rate, "
                  "Mdot ~ (1 + t/t_s)^(-eta)", domain=(0.0, np.inf)),
    ),
    log_factor=_log_viscous,
    formula="T(t) = (1 + t / viscous_time)^(-viscous_eta / 2)",
)
