"""Internal unit system and physical constants.

bhgrow computes on plain float64 arrays in one internal unit system; units are attached
only at the public boundary (see DEVELOPERS.md, "Units at the boundary").

Internal units
--------------
======== =====================
mass     Msun (physical, never Msun/h)
length   kpc (physical) for halo scales; Mpc (comoving) for volumes
velocity km/s
time     Gyr
rates    Msun/Gyr
======== =====================

Every constant below is computed once at import from :mod:`astropy.constants`
(CODATA 2018 / IAU 2015 values shipped with astropy) and stored as a plain float.
"""

from __future__ import annotations

import astropy.constants as _c
import astropy.units as _u

# --- conversion factors (astropy.units) ---------------------------------------------------
KPC_CM: float = float((1 * _u.kpc).to_value(_u.cm))
MPC_KPC: float = 1.0e3
GYR_S: float = float((1 * _u.Gyr).to_value(_u.s))
YR_S: float = float((1 * _u.yr).to_value(_u.s))  # Julian year
KMS_CMS: float = 1.0e5
MSUN_G: float = float(_c.M_sun.cgs.value)
#: one kpc / (km/s) expressed in Gyr (~0.978 Gyr)
KPC_PER_KMS_GYR: float = float((1 * _u.kpc / (_u.km / _u.s)).to_value(_u.Gyr))

# --- fundamental constants in internal units ----------------------------------------------
#: Newton's G in kpc (km/s)^2 / Msun (~4.30e-6)
G_KPC_KMS2_MSUN: float = float(_c.G.to_value(_u.kpc * _u.km**2 / _u.s**2 / _u.Msun))
#: Newton's G in Mpc^3 / (Msun Gyr^2), for densities and growth times
G_MPC3_MSUN_GYR2: float = float(_c.G.to_value(_u.Mpc**3 / _u.Msun / _u.Gyr**2))
#: speed of light in km/s
C_KMS: float = float(_c.c.to_value(_u.km / _u.s))

# --- cgs constants (for thermal and radiative quantities) ---------------------------------
G_CGS: float = float(_c.G.cgs.value)
C_CGS: float = float(_c.c.cgs.value)
M_P_G: float = float(_c.m_p.cgs.value)
K_B_CGS: float = float(_c.k_B.cgs.value)
SIGMA_T_CGS: float = float(_c.sigma_T.cgs.value)
L_SUN_CGS: float = float(_c.L_sun.cgs.value)

#: Eddington luminosity per solar mass, 4 pi G m_p c / sigma_T, in erg/s (~1.26e38)
L_EDD_PER_MSUN_CGS: float = 4.0 * 3.141592653589793 * G_CGS * M_P_G * C_CGS / SIGMA_T_CGS * MSUN_G
#: Eddington (Salpeter) time sigma_T c / (4 pi G m_p) in Gyr (~0.45 Gyr)
T_EDD_GYR: float = SIGMA_T_CGS * C_CGS / (4.0 * 3.141592653589793 * G_CGS * M_P_G) / GYR_S

#: critical density today for h = 1, 3 H^2 / (8 pi G), in Msun / Mpc^3 (~2.775e11 h^2)
RHO_CRIT0_H2_MSUN_MPC3: float = float(
    (3 * (100 * _u.km / _u.s / _u.Mpc) ** 2 / (8 * 3.141592653589793 * _c.G)).to_value(
        _u.Msun / _u.Mpc**3
    )
)
