"""Coupling of the accretion luminosity to the gas reservoir (AGN feedback).

A black hole that takes ``accreted`` Msun of gas with radiative efficiency ``eps`` radiates
``E = eps * accreted * c^2``; it carries momentum ``E / c = eps * accreted * c``. A component
turns that into a mass of reservoir gas pushed out of the halo at its escape speed
``v_esc`` (DESIGN §6):

* energy-driven: a fraction ``coupling`` of ``E`` becomes kinetic energy of the outflow,
  ``M_out = 2 coupling E / v_esc^2`` (the energy argument of Silk & Rees 1998);
* momentum-driven: the outflow carries ``coupling`` times the radiation momentum,
  ``M_out = coupling E / (c v_esc)`` (King 2003, 2005).

Everything is float64 arrays in the internal units of :mod:`bhgrow.constants` (Msun, km/s);
``c`` and ``v_esc`` are both in km/s, so the ratios are dimensionless. The caller caps the
outflow at the gas the reservoir holds.

References
----------
.. [SR98] Silk J., Rees M. J., 1998, A&A, 331, L1
.. [K03] King A., 2003, ApJ, 596, L27
.. [K05] King A., 2005, ApJ, 635, L121
.. [DM05] Di Matteo T., Springel V., Hernquist L., 2005, Nature, 433, 604
.. [SDH05] Springel V., Di Matteo T., Hernquist L., 2005, MNRAS, 361, 776

Journal references are from memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .. import _validate
from ..constants import C_KMS, G_CGS, KMS_CMS, M_P_G, MSUN_G, SIGMA_T_CGS

__all__ = [
    "DEFAULT_ENERGY_COUPLING",
    "DEFAULT_MOMENTUM_COUPLING",
    "DEFAULT_F_GAS",
    "EnergyDriven",
    "MomentumDriven",
    "NoFeedback",
    "FEEDBACK_MODES",
    "king_msigma_msun",
]

# --- defaults (every one is a config key; unit and source beside each) --------------------
#: fraction of the luminosity that couples thermally/kinetically [dimensionless]: 0.05
#: (Di Matteo, Springel & Hernquist 2005; Springel, Di Matteo & Hernquist 2005; memory)
DEFAULT_ENERGY_COUPLING: float = 0.05
#: fraction of the radiation momentum L/c given to the outflow [dimensionless]: 1, a
#: single-scattering wind that is optically thick to electron scattering (King 2003)
DEFAULT_MOMENTUM_COUPLING: float = 1.0
#: gas fraction f_gas of the isothermal halo in King's M_sigma [dimensionless]: 0.16, the
#: cosmic baryon fraction Omega_b/Omega_m (King 2003; memory)
DEFAULT_F_GAS: float = 0.16


def _radiated_kms2(accreted_gas, efficiency) -> np.ndarray:
    """``eps * accreted``: radiated energy divided by c^2, Msun."""
    return np.asarray(efficiency, dtype=np.float64) * np.asarray(accreted_gas,
                                                                 dtype=np.float64)


@dataclass(frozen=True)
class EnergyDriven:
    """Energy-driven feedback: a fraction of the luminosity unbinds reservoir gas.

    Parameters
    ----------
    coupling : float, optional
        Fraction ``eps_f`` of ``L = eps Mdot c^2`` that couples to the gas, in [0, 1]
        (default 0.05, [DM05]_).
    """

    coupling: float = DEFAULT_ENERGY_COUPLING

    def __post_init__(self) -> None:
        object.__setattr__(self, "coupling",
                           _validate.in_range(type(self).__name__, "coupling", self.coupling,
                                              0.0, 1.0))

    def gas_removed(self, accreted_gas, efficiency, v_esc) -> np.ndarray:
        """Reservoir gas expelled at the escape speed, Msun.

        Parameters
        ----------
        accreted_gas : array_like
            Gas accreted by the black hole, Msun.
        efficiency : array_like
            Radiative efficiency ``eps`` of that accretion.
        v_esc : array_like
            Escape speed of the halo, km/s (> 0).

        Returns
        -------
        numpy.ndarray
            ``2 eps_f eps accreted c^2 / v_esc^2`` in Msun (uncapped), broadcast shape.
        """
        v = np.asarray(v_esc, dtype=np.float64)
        # M_out v_esc^2 / 2 = eps_f E, E = eps M_acc c^2  (Silk & Rees 1998, A&A 331, L1 energy
        # argument; coupled fraction as Di Matteo et al. 2005, Nature 433, 604)
        return (2.0 * self.coupling * C_KMS * C_KMS) * _radiated_kms2(accreted_gas,
                                                                       efficiency) / (v * v)


@dataclass(frozen=True)
class MomentumDriven:
    """Momentum-driven feedback: the radiation momentum ``L/c`` drives gas out.

    Parameters
    ----------
    coupling : float, optional
        Multiple of the radiation momentum given to the outflow, >= 0 (default 1, [K03]_;
        > 1 for winds that scatter photons more than once).
    """

    coupling: float = DEFAULT_MOMENTUM_COUPLING

    def __post_init__(self) -> None:
        object.__setattr__(self, "coupling",
                           _validate.non_negative(type(self).__name__, "coupling",
                                                  self.coupling))

    def gas_removed(self, accreted_gas, efficiency, v_esc) -> np.ndarray:
        """Reservoir gas expelled at the escape speed, Msun.

        Parameters
        ----------
        accreted_gas, efficiency, v_esc : array_like
            As in :meth:`EnergyDriven.gas_removed`.

        Returns
        -------
        numpy.ndarray
            ``coupling eps accreted c / v_esc`` in Msun (uncapped), broadcast shape.
        """
        v = np.asarray(v_esc, dtype=np.float64)
        # M_out v_esc = coupling E / c, E / c = eps M_acc c  (King 2003, ApJ 596, L27)
        return (self.coupling * C_KMS) * _radiated_kms2(accreted_gas, efficiency) / v


@dataclass(frozen=True)
class NoFeedback:
    """No coupling of the accretion luminosity to the gas."""

    def gas_removed(self, accreted_gas, efficiency, v_esc) -> np.ndarray:
        """Zeros of the broadcast shape of the arguments, Msun."""
        shape = np.broadcast_shapes(np.shape(accreted_gas), np.shape(efficiency),
                                    np.shape(v_esc))
        return np.zeros(shape)


#: feedback modes selectable by name (config name -> class)
FEEDBACK_MODES = {
    "energy": EnergyDriven,
    "momentum": MomentumDriven,
    "none": NoFeedback,
}


def king_msigma_msun(sigma_kms, f_gas=DEFAULT_F_GAS) -> np.ndarray:
    """King's (2003) black-hole mass at which momentum feedback clears an isothermal halo.

    Parameters
    ----------
    sigma_kms : array_like
        Velocity dispersion of the singular isothermal sphere, km/s.
    f_gas : float or array_like, optional
        Gas fraction of the sphere (default 0.16).

    Returns
    -------
    numpy.ndarray
        ``M_sigma = f_gas kappa sigma^4 / (pi G^2)`` in Msun with the electron-scattering
        opacity ``kappa = sigma_T / m_p``; ~3.7e8 Msun at 200 km/s for ``f_gas = 0.16``.

    Notes
    -----
    The Eddington thrust ``L_Edd / c = 4 pi G M / kappa`` equals the weight
    ``4 f_gas sigma^4 / G`` of a swept-up gas shell in the isothermal potential
    ([K03]_, [K05]_).
    """
    s = np.asarray(sigma_kms, dtype=np.float64) * KMS_CMS
    kappa = SIGMA_T_CGS / M_P_G
    # M_sigma = f_g kappa sigma^4 / (pi G^2)  (King 2003, ApJ 596, L27; memory)
    return np.asarray(f_gas, dtype=np.float64) * kappa * s**4 / (math.pi * G_CGS**2) / MSUN_G
