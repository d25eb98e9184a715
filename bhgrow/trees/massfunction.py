"""Halo mass functions: Press & Schechter (1974) and Sheth & Tormen (1999).

Both are written as ``dn/dln M = (rho_mean / M) F(nu) |dln sigma / dln M|`` with peak height
``nu = delta_c(z) / sigma(M, 0) = delta_crit(z) / sigma(M, z)`` and the multiplicity function
``F(nu) = nu f(nu)`` normalised so that ``int F dln nu = int f dnu = 1`` (all mass is in
haloes of some mass):

* Press & Schechter 1974 ([PS74]_, with the factor 2 of Bond et al. 1991):
  ``F(nu) = sqrt(2/pi) nu exp(-nu^2/2)``;
* Sheth & Tormen 1999 ([ST99]_, eq. 10 in the same normalisation):
  ``F(nu) = A sqrt(2a/pi) [1 + (a nu^2)^-p] nu exp(-a nu^2/2)`` with ``a = 0.707``,
  ``p = 0.3`` and ``A = 1 / (1 + 2^-p Gamma(1/2 - p) / sqrt(pi)) = 0.3222`` from the
  normalisation.

Masses are physical Msun, densities comoving Mpc^-3; ``sigma``, its slope, ``delta_c(z)`` and
``rho_mean`` (cold matter, CDM + baryons) come from :class:`~bhgrow.trees.power.LinearPower`,
so ``delta_c_omega_dependence`` of that object also applies here.

References
----------
.. [PS74] Press W. H., Schechter P., 1974, ApJ, 187, 425
.. [ST99] Sheth R. K., Tormen G., 1999, MNRAS, 308, 119
.. [BCEK91] Bond J. R., Cole S., Efstathiou G., Kaiser N., 1991, ApJ, 379, 440
"""

from __future__ import annotations

import math

import numpy as np

from .. import _validate
from ..errors import BhgrowInputError
from .power import LinearPower

__all__ = ["press_schechter", "sheth_tormen", "MASS_FUNCTIONS", "number_density",
           "ps_multiplicity", "st_multiplicity", "st_normalisation", "ST_SMALL_A_DEFAULT",
           "ST_P_DEFAULT", "DEFAULT_MODEL"]

# ------------------------------------------------------------------------------------------
# Defaults (each with its source)
# ------------------------------------------------------------------------------------------
#: Sheth & Tormen 1999 (MNRAS 308, 119), eq. 10 and text: "a" = 0.707 (rescales nu^2 to
#: a nu^2) and p = 0.3; the amplitude "A" is not a default but follows from the normalisation
#: (st_normalisation; 0.3222 for p = 0.3, as published)
ST_SMALL_A_DEFAULT = 0.707
ST_P_DEFAULT = 0.3
#: default model for number_density: Sheth & Tormen 1999 (closer to N-body abundances than
#: Press & Schechter 1974; Sheth & Tormen 1999, fig. 2)
DEFAULT_MODEL = "sheth_tormen"
#: number_density quadrature: Gauss-Legendre panels of this width in ln M, 8 nodes each
_PANEL_LNM = 0.02
_N_GAUSS = 8


def ps_multiplicity(nu):
    """Press & Schechter (1974) multiplicity function ``F(nu) = nu f(nu)``.

    Parameters
    ----------
    nu : float or array_like
        Peak height delta_c / sigma, > 0.

    Returns
    -------
    ndarray
        ``sqrt(2/pi) nu exp(-nu^2/2)``; ``int_0^inf F dln nu = 1``.
    """
    nu = np.asarray(nu, dtype=np.float64)
    # F = sqrt(2/pi) nu exp(-nu^2/2) (Press & Schechter 1974, ApJ 187, 425; factor 2 of
    # Bond et al. 1991, ApJ 379, 440)
    return math.sqrt(2.0 / math.pi) * nu * np.exp(-0.5 * nu * nu)


def st_normalisation(p: float) -> float:
    """Normalisation A(p) of the Sheth & Tormen multiplicity function.

    Parameters
    ----------
    p : float
        Low-mass slope parameter, 0 <= p < 1/2.

    Returns
    -------
    float
        ``A = 1 / (1 + 2^-p Gamma(1/2 - p) / sqrt(pi))`` (0.3222 for p = 0.3; Sheth & Tormen
        1999), so that ``int F dln nu = 1``.
    """
    # A = [1 + 2^-p Gamma(1/2 - p)/sqrt(pi)]^-1 (Sheth & Tormen 1999, MNRAS 308, 119, text)
    from scipy.special import gamma

    return 1.0 / (1.0 + 2.0**-p * gamma(0.5 - p) / math.sqrt(math.pi))


def _st_params(a, p, A):
    owner = "sheth_tormen"
    a = _validate.positive(owner, "a", a)
    p = _validate.in_range(owner, "p", p, 0.0, 0.5, hi_open=True)
    A = st_normalisation(p) if A is None else _validate.positive(owner, "A", A)
    return a, p, A


def st_multiplicity(nu, *, a=ST_SMALL_A_DEFAULT, p=ST_P_DEFAULT, A=None):
    """Sheth & Tormen (1999) multiplicity function ``F(nu) = nu f(nu)``.

    Parameters
    ----------
    nu : float or array_like
        Peak height delta_c / sigma, > 0.
    a, p : float, optional
        Published values 0.707 and 0.3 (Sheth & Tormen 1999).
    A : float, optional
        Amplitude; default from the normalisation, :func:`st_normalisation`.

    Returns
    -------
    ndarray
        ``A sqrt(2a/pi) [1 + (a nu^2)^-p] nu exp(-a nu^2 / 2)``.
    """
    a, p, A = _st_params(a, p, A)
    nu = np.asarray(nu, dtype=np.float64)
    anu2 = a * nu * nu
    # F = A sqrt(2a/pi) [1 + (a nu^2)^-p] nu exp(-a nu^2/2) (Sheth & Tormen 1999, eq. 10)
    return A * math.sqrt(2.0 * a / math.pi) * (1.0 + anu2**-p) * nu * np.exp(-0.5 * anu2)


def _mass_function(m_msun, z, power: LinearPower, multiplicity):
    if not isinstance(power, LinearPower):
        raise BhgrowInputError(f"`power` must be a LinearPower; got {type(power).__name__}",
                               source="mass function", rule="power")
    m = np.asarray(m_msun, dtype=np.float64)
    zz = np.asarray(z, dtype=np.float64)
    scalar = m.ndim == 0 and zz.ndim == 0
    m_b, z_b = np.broadcast_arrays(np.atleast_1d(m), np.atleast_1d(zz))
    sigma0 = np.asarray(power.sigma(m_b))
    slope = np.asarray(power.dlnsigma_dlnm(m_b))
    w = np.asarray(power.delta_c(z_b))
    nu = w / sigma0  # nu = delta_c(z)/sigma(M, 0) = delta_crit/sigma(M, z) (Lacey & Cole 1993)
    # dn/dlnM = (rho_mean / M) F(nu) |dln sigma/dln M| (Press & Schechter 1974, eq. for n(M))
    out = power.rho_mean_msun_mpc3 / m_b * multiplicity(nu) * np.abs(slope)
    return float(out[0]) if scalar else out


def press_schechter(m_msun, z, power: LinearPower):
    """Press & Schechter (1974) halo mass function.

    Parameters
    ----------
    m_msun : float or array_like
        Halo mass in physical Msun (within the sigma table of ``power``).
    z : float or array_like
        Redshift in [0, cosmo.z_max]; broadcast against ``m_msun``.
    power : LinearPower
        Linear-theory tables (sigma(M), delta_c(z), mean density).

    Returns
    -------
    float or ndarray
        dn/dln M in comoving Mpc^-3.
    """
    return _mass_function(m_msun, z, power, ps_multiplicity)


def sheth_tormen(m_msun, z, power: LinearPower, *, a=ST_SMALL_A_DEFAULT, p=ST_P_DEFAULT, A=None):
    """Sheth & Tormen (1999) halo mass function.

    Parameters
    ----------
    m_msun : float or array_like
        Halo mass in physical Msun (within the sigma table of ``power``).
    z : float or array_like
        Redshift in [0, cosmo.z_max]; broadcast against ``m_msun``.
    power : LinearPower
        Linear-theory tables.
    a, p : float, optional
        Sheth & Tormen (1999) parameters, published values 0.707 and 0.3.
    A : float, optional
        Amplitude; default ``st_normalisation(p)`` (0.3222 for p = 0.3).

    Returns
    -------
    float or ndarray
        dn/dln M in comoving Mpc^-3.

    Raises
    ------
    ParameterError
        For a <= 0, p outside [0, 1/2) or A <= 0.
    """
    a, p, A = _st_params(a, p, A)
    return _mass_function(m_msun, z, power, lambda nu: st_multiplicity(nu, a=a, p=p, A=A))


#: registry of mass-function models by name
MASS_FUNCTIONS = {"press_schechter": press_schechter, "sheth_tormen": sheth_tormen}


def number_density(m_lo, m_hi, z, power: LinearPower, model: str = DEFAULT_MODEL) -> float:
    """Comoving number density of haloes with ``m_lo <= M <= m_hi`` at redshift z.

    Parameters
    ----------
    m_lo, m_hi : float
        Mass limits in physical Msun, ``m_lo <= m_hi``, within the sigma table of ``power``.
    z : float
        Redshift in [0, cosmo.z_max].
    power : LinearPower
        Linear-theory tables.
    model : str, optional
        A key of :data:`MASS_FUNCTIONS` (default "sheth_tormen").

    Returns
    -------
    float
        ``int dn/dln M dln M`` in comoving Mpc^-3, by Gauss-Legendre quadrature in ln M
        (8 nodes per panel of width <= 0.02, enough to follow the exponential cut-off).
    """
    _validate.one_of("number_density", "model", model, MASS_FUNCTIONS)
    lo = _validate.positive("number_density", "m_lo", m_lo)
    hi = _validate.positive("number_density", "m_hi", m_hi)
    zz = _validate.non_negative("number_density", "z", z)
    if hi < lo:
        raise BhgrowInputError(f"`m_hi` of number_density must be >= m_lo ({lo:g}); got {hi!r}",
                               source="number_density", rule="m_hi")
    if hi == lo:
        return 0.0
    a, b = math.log(lo), math.log(hi)
    n_panel = max(1, int(math.ceil((b - a) / _PANEL_LNM)))
    width = (b - a) / n_panel
    nodes, weights = np.polynomial.legendre.leggauss(_N_GAUSS)
    mid = a + width * (np.arange(n_panel) + 0.5)
    lnm = (mid[:, None] + 0.5 * width * nodes[None, :]).ravel()
    # keep the end points exactly inside the table despite exp/log round-off
    m = np.clip(np.exp(lnm), lo, hi)
    f = MASS_FUNCTIONS[model](m, zz, power)
    return float(np.sum(f.reshape(n_panel, _N_GAUSS) @ weights) * 0.5 * width)
