"""Disk physics used by the field profiles: Kepler rotation, MMSN, accretion-field relations.

All functions are vectorised numpy functions of plain floats in stated units (SI unless the
parameter says otherwise); constants come from ``astropy.constants``.

Sources (see the project's reference notes):

* Keplerian angular velocity, Omega = sqrt(G M* / r^3): Kepler's third law.
* Angular-momentum balance of a steady disk, W = Mdot Omega / (2 pi), with W the vertically
  integrated r-phi stress: derived; cf. Wardle 2007, Astrophys. Space Sci. 311, 35 and
  Bai & Goodman 2009, ApJ 701, 737.
* MRI-type (Maxwell) stress over a thickness 2h, W = 2 h eps B^2 / mu0, gives
  B = sqrt(mu0 Omega Mdot / (4 pi h eps)): derived from the balance above.
* Magnetised wind, torque on both faces, Mdot = 8 pi r |B_z B_phi| / (mu0 Omega), gives
  sqrt|B_z B_phi| = sqrt(mu0 Mdot Omega / (8 pi r)): derived; form as in Bai & Stone 2013.
* Minimum-mass solar nebula (Hayashi 1981, Prog. Theor. Phys. Suppl. 70, 35):
  Sigma = 1700 (r/AU)^(-3/2) g cm^-2, T = 280 (r/AU)^(-1/2) K (values from memory).
* Plasma beta, B = sqrt(2 mu0 P / beta): definition.
* Viscous similarity solution with nu ~ r^gamma: eta = (5/2 - gamma) / (2 - gamma)
  (Lynden-Bell & Pringle 1974, MNRAS 168, 603; Hartmann et al. 1998, ApJ 495, 385).
"""
from __future__ import annotations

import numpy as np
from astropy import constants as const
from astropy import units as u

__all__ = [
    "AU_M",
    "MU0",
    "GM_SUN",
    "MSUN_PER_YR_KG_S",
    "MMSN_SIGMA_1AU",
    "MMSN_TEMPERATURE_1AU",
    "MEAN_MOLECULAR_WEIGHT",
    "keplerian_omega",
    "mass_rate_kg_s",
    "mmsn_surface_density",
    "mmsn_temperature",
    "mmsn_sound_speed",
    "mmsn_scale_height",
    "mmsn_aspect_ratio",
    "mmsn_midplane_pressure",
    "plasma_beta_field",
    "mri_field",
    "wind_field",
    "viscous_eta",
]

#: Astronomical unit [m] (IAU 2012 Resolution B2, via astropy).
AU_M = float(const.au.to_value(u.m))
#: Vacuum permeability [N A^-2] (CODATA, via astropy).
MU0 = float(const.mu0.to_value(u.N / u.A**2))
#: G * M_sun [m^3 s^-2] (astropy's G and IAU nominal solar mass).
GM_SUN = float((const.G * const.M_sun).to_value(u.m**3 / u.s**2))
#: 1 M_sun / yr in kg/s (Julian year of 365.25 d, IAU convention).
MSUN_PER_YR_KG_S = float((1 * u.M_sun / u.yr).to_value(u.kg / u.s))
#: MMSN gas surface density at 1 AU [kg m^-2] (Hayashi 1981: 1700 g cm^-2; from memory).
MMSN_SIGMA_1AU = float((1700 * u.g / u.cm**2).to_value(u.kg / u.m**2))
#: MMSN midplane temperature at 1 AU [K] (Hayashi 1981: 280 K; from memory).
MMSN_TEMPERATURE_1AU = 280.0
#: Mean molecular weight of solar-composition molecular gas (common practice, no source).
MEAN_MOLECULAR_WEIGHT = 2.34


def keplerian_omega(r_au, m_star_msun=1.0):
    """Keplerian angular velocity.

    Parameters
    ----------
    r_au : array_like
        Distance from the star [AU].
    m_star_msun : array_like, optional
        Stellar mass [M_sun].

    Returns
    -------
    ndarray
        Omega [s^-1].

    Notes
    -----
    Omega = sqrt(G M* / r^3) (Kepler's third law).
    """
    r_m = np.asarray(r_au, dtype=float) * AU_M
    return np.sqrt(GM_SUN * np.asarray(m_star_msun, dtype=float) / r_m**3)


def mass_rate_kg_s(mdot_msun_yr):
    """Convert an accretion rate from M_sun/yr [M_sun yr^-1] to kg/s [kg s^-1]."""
    return np.asarray(mdot_msun_yr, dtype=float) * MSUN_PER_YR_KG_S


def mmsn_surface_density(r_au):
    """MMSN gas surface density Sigma = 1700 (r/AU)^(-3/2) g cm^-2, returned in [kg m^-2].

    Parameters
    ----------
    r_au : array_like
        Distance [AU].
    """
    return MMSN_SIGMA_1AU * np.asarray(r_au, dtype=float) ** -1.5


def mmsn_temperature(r_au):
    """MMSN midplane temperature T = 280 (r/AU)^(-1/2) [K] for ``r_au`` in [AU]."""
    return MMSN_TEMPERATURE_1AU * np.asarray(r_au, dtype=float) ** -0.5


def mmsn_sound_speed(r_au):
    """Isothermal sound speed c_s = sqrt(k T / (mu m_u)) of the MMSN [m s^-1]; ``r_au`` in [AU]."""
    m_gas = MEAN_MOLECULAR_WEIGHT * float(const.u.to_value(u.kg))
    return np.sqrt(float(const.k_B.value) * mmsn_temperature(r_au) / m_gas)


def mmsn_scale_height(r_au, m_star_msun=1.0):
    """Pressure scale height h = c_s / Omega of the MMSN [m]; ``r_au`` in [AU], mass in [M_sun]."""
    return mmsn_sound_speed(r_au) / keplerian_omega(r_au, m_star_msun)


def mmsn_aspect_ratio(r_au, m_star_msun=1.0):
    """Aspect ratio h / r of the MMSN (dimensionless), about 0.033 (r/AU)^(1/4).

    Parameters
    ----------
    r_au : array_like
        Distance [AU].
    m_star_msun : array_like, optional
        Stellar mass [M_sun].
    """
    return mmsn_scale_height(r_au, m_star_msun) / (np.asarray(r_au, dtype=float) * AU_M)


def mmsn_midplane_pressure(r_au, m_star_msun=1.0):
    """Midplane gas pressure P = rho_0 c_s^2 of the MMSN [Pa].

    Notes
    -----
    Vertically isothermal hydrostatic disk: rho_0 = Sigma / (sqrt(2 pi) h).
    """
    rho0 = mmsn_surface_density(r_au) / (np.sqrt(2 * np.pi) * mmsn_scale_height(r_au, m_star_msun))
    return rho0 * mmsn_sound_speed(r_au) ** 2


def plasma_beta_field(pressure_pa, beta):
    """Field strength at plasma beta ``beta``: B = sqrt(2 mu0 P / beta) [T].

    Parameters
    ----------
    pressure_pa : array_like
        Gas pressure [Pa].
    beta : array_like
        Plasma beta (dimensionless).
    """
    return np.sqrt(2 * MU0 * np.asarray(pressure_pa, float) / np.asarray(beta, float))


def mri_field(r_au, mdot_msun_yr, stress_efficiency, aspect_ratio=None, m_star_msun=1.0):
    """Field strength of an accreting disk whose transport is an MRI-type Maxwell stress.

    Parameters
    ----------
    r_au : array_like
        Distance [AU].
    mdot_msun_yr : array_like
        Accretion rate [M_sun yr^-1].
    stress_efficiency : array_like
        eps = |B_r B_phi| / B^2 (dimensionless; about 0.1-0.5 in simulations, from memory).
    aspect_ratio : array_like, optional
        h / r (dimensionless); default: the MMSN value at ``r_au``.
    m_star_msun : array_like, optional
        Stellar mass [M_sun].

    Returns
    -------
    ndarray
        B [T].

    Notes
    -----
    W = Mdot Omega / (2 pi) = 2 h eps B^2 / mu0  =>  B = sqrt(mu0 Omega Mdot / (4 pi h eps)).
    """
    r_au = np.asarray(r_au, dtype=float)
    if aspect_ratio is None:
        aspect_ratio = mmsn_aspect_ratio(r_au, m_star_msun)
    h = np.asarray(aspect_ratio, float) * r_au * AU_M
    omega = keplerian_omega(r_au, m_star_msun)
    mdot = mass_rate_kg_s(mdot_msun_yr)
    return np.sqrt(MU0 * omega * mdot / (4 * np.pi * h * np.asarray(stress_efficiency, float)))


def wind_field(r_au, mdot_msun_yr, m_star_msun=1.0):
    """Geometric-mean field sqrt|B_z B_phi| of a disk whose accretion is driven by a wind.

    Parameters
    ----------
    r_au : array_like
        Distance [AU].
    mdot_msun_yr : array_like
        Accretion rate driven by the wind torque [M_sun yr^-1].
    m_star_msun : array_like, optional
        Stellar mass [M_sun].

    Returns
    -------
    ndarray
        sqrt|B_z B_phi| [T].

    Notes
    -----
    Torque on both faces: Mdot = 8 pi r |B_z B_phi| / (mu0 Omega), so
    sqrt|B_z B_phi| = sqrt(mu0 Mdot Omega / (8 pi r)), proportional to r^(-5/4).
    """
    r_m = np.asarray(r_au, dtype=float) * AU_M
    omega = keplerian_omega(r_au, m_star_msun)
    return np.sqrt(MU0 * mass_rate_kg_s(mdot_msun_yr) * omega / (8 * np.pi * r_m))


def viscous_eta(gamma):
    """Decline exponent of Mdot(t) in the viscous similarity solution (dimensionless).

    Parameters
    ----------
    gamma : array_like
        Viscosity power index, nu ~ r^gamma (dimensionless, < 2).

    Notes
    -----
    Mdot ~ (1 + t/t_s)^(-eta), eta = (5/2 - gamma) / (2 - gamma); eta = 3/2 for gamma = 1
    (Lynden-Bell & Pringle 1974; Hartmann et al. 1998).
    """
    gamma = np.asarray(gamma, dtype=float)
    return (2.5 - gamma) / (2.0 - gamma)
