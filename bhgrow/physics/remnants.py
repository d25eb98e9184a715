"""Remnants of black-hole coalescences: radiated mass, final spin and recoil velocity.

Fits to numerical-relativity simulations, one per quantity (DESIGN §6):

final spin
    Barausse & Rezzolla (2009) [BR09]_, the generic-spin extension of Rezzolla et al.
    (2008) [R08]_: ``a_fin = |a1 + q^2 a2 + q l| / (1 + q)^2`` with ``l`` along the orbital
    angular momentum (:func:`final_spin_vector`).
radiated mass
    Barausse, Morozova & Rezzolla (2012) [BMR12]_: the test-particle ISCO binding energy plus
    a quadratic correction in the symmetric mass ratio (:func:`radiated_fraction`).
recoil
    The form of Campanelli et al. (2007) [C07]_ with the mass-asymmetry term of González et al.
    (2007) [G07]_, the in-plane spin term of Lousto & Zlochower (2008) [LZ08]_ and the
    out-of-plane ("superkick") term either of [C07]_ (``"campanelli_2007"``) or with the
    hang-up corrections of Lousto et al. (2012) [L12]_ (``"lousto_2012"``, default)
    (:func:`recoil_vector_kms`).

Spins at merger (magnitudes and orientations) are drawn by :class:`SpinDraw`: nearly aligned
with the orbit in gas-rich mergers, where torques from circumnuclear gas align the spins
before coalescence ([BRM07]_, [D10]_), isotropic in gas-poor ones.

Conventions
-----------
* Black hole 1 is the heavier: ``q = m2 / m1`` in [0, 1]; :meth:`RemnantModel.remnant`
  swaps the pair where ``m2 > m1``. ``eta = m1 m2 / (m1 + m2)^2`` (symmetric mass ratio).
* Spins are dimensionless vectors ``chi = c S / (G m^2)`` with ``|chi| <= 1``, shape
  ``(n, 3)``, in a frame whose z axis is the orbital angular momentum of the binary and whose
  x axis is the in-plane reference direction of the recoil fits (the infall direction at
  merger, rotated by the fits' phase ``phi_1``). :class:`SpinDraw` draws the azimuths of both
  spins uniformly, so the phase of the out-of-plane kick, ``cos(phi_Delta - phi_1)``, is the
  azimuth of the in-plane spin difference in this frame and needs no separate draw.
* Masses in Msun, velocities in km/s.

A remnant whose kick exceeds the central escape speed of its host is ejected; the caller
(the pair bookkeeping of the engine) compares ``kick_kms`` with that speed, records the
remnant and removes it from the host.

References
----------
.. [R08] Rezzolla L., Barausse E., Dorband E. N., Pollney D., Reisswig C., Seiler J.,
   Husa S., 2008, PRD, 78, 044002; Rezzolla L. et al., 2008, ApJ, 674, L29
.. [BR09] Barausse E., Rezzolla L., 2009, ApJ, 704, L40
.. [BMR12] Barausse E., Morozova V., Rezzolla L., 2012, ApJ, 758, 63
.. [BPT72] Bardeen J. M., Press W. H., Teukolsky S. A., 1972, ApJ, 178, 347
.. [C07] Campanelli M., Lousto C. O., Zlochower Y., Merritt D., 2007, ApJ, 659, L5;
   Campanelli M. et al., 2007, PRL, 98, 231102
.. [G07] González J. A., Sperhake U., Brügmann B., Hannam M., Husa S., 2007, PRL, 98, 091101
.. [LZ08] Lousto C. O., Zlochower Y., 2008, PRD, 77, 044028
.. [LZ11] Lousto C. O., Zlochower Y., 2011, PRL, 107, 231102
.. [L12] Lousto C. O., Zlochower Y., Dotti M., Volonteri M., 2012, PRD, 85, 084015
.. [BRM07] Bogdanović T., Reynolds C. S., Miller M. C., 2007, ApJ, 661, L147
.. [D10] Dotti M., Volonteri M., Perego A., Colpi M., Ruszkowski M., Haardt F., 2010,
   MNRAS, 402, 682
.. [T74] Thorne K. S., 1974, ApJ, 191, 507
.. [P64] Peters P. C., 1964, Phys. Rev., 136, B1224

Fit coefficients and journal references were written from memory, marked "(memory)".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar, NamedTuple

import numpy as np

from .. import _validate
from ..errors import ParameterError
from .accretion import r_isco

__all__ = [
    "DEFAULT_SPIN_ORIENTATION",
    "DEFAULT_SPIN_MAGNITUDE",
    "DEFAULT_GAS_FRACTION_THRESHOLD",
    "DEFAULT_ALIGNED_MAX_ANGLE_DEG",
    "DEFAULT_MAGNITUDE_MIN",
    "DEFAULT_MAGNITUDE_MAX",
    "DEFAULT_RECOIL_FIT",
    "FINAL_SPIN_FITS",
    "RADIATION_FITS",
    "RECOIL_FITS",
    "chirp_mass",
    "symmetric_mass_ratio",
    "final_spin_vector",
    "radiated_fraction",
    "recoil_vector_kms",
    "SpinDraw",
    "Remnant",
    "RemnantModel",
]

# =============================================================================================
# Defaults (every one is a config key; unit and source beside each)
# =============================================================================================
#: orientation of the spins at merger: "by_gas" = aligned with the orbit where the host is
#: gas-rich (gas torques align the spins before coalescence: Bogdanović, Reynolds & Miller
#: 2007, ApJ 661, L147; Dotti et al. 2010, MNRAS 402, 682), isotropic elsewhere
DEFAULT_SPIN_ORIENTATION: str = "by_gas"
#: spin magnitudes at merger: "own" = the black holes' tracked spins
DEFAULT_SPIN_MAGNITUDE: str = "own"
#: gas fraction above which a merger counts as gas-rich [dimensionless, M_gas/(M_gas+M_*)
#: as the caller defines it]: 0.1, a stated model choice (no published calibration)
DEFAULT_GAS_FRACTION_THRESHOLD: float = 0.1
#: largest angle between a spin and the orbital angular momentum in aligned (gas-rich)
#: mergers [deg]: 10, the residual misalignment in cold, dense circumnuclear discs of Dotti
#: et al. 2010 (~30 deg in hot discs; memory), cf. Bogdanović et al. 2007
DEFAULT_ALIGNED_MAX_ANGLE_DEG: float = 10.0
#: lower and upper ends of uniformly drawn spin magnitudes (magnitude = "uniform")
#: [dimensionless]: 0 and 0.998, the disc-accretion limit of Thorne 1974 (ApJ 191, 507)
DEFAULT_MAGNITUDE_MIN: float = 0.0
DEFAULT_MAGNITUDE_MAX: float = 0.998
#: recoil fit: "lousto_2012" (Lousto et al. 2012, PRD 85, 084015, with hang-up terms)
DEFAULT_RECOIL_FIT: str = "lousto_2012"

# --- fit coefficients (not config keys) -----------------------------------------------------
# Final spin, Barausse & Rezzolla 2009 (ApJ 704, L40), eqs. for |l| (memory):
_BR09_S4 = -0.1229    # +- 0.0075
_BR09_S5 = 0.4537     # +- 0.1463
_BR09_T0 = -2.8904    # +- 0.0359
_BR09_T2 = -3.5171    # +- 0.1208
_BR09_T3 = 2.5763     # +- 0.4833
# Radiated energy, Barausse, Morozova & Rezzolla 2012 (ApJ 758, 63) (memory):
_BMR12_P0 = 0.04827   # +- 0.00039
_BMR12_P1 = 0.01707   # +- 0.00032
# Recoil, mass-asymmetry term, González et al. 2007 (PRL 98, 091101) (memory):
_G07_A_KMS = 1.2e4
_G07_B = -0.93
# Recoil, in-plane spin term, Lousto & Zlochower 2008 (PRD 77, 044028) (memory):
_LZ08_H_KMS = 6.9e3
_LZ08_XI_RAD = math.radians(145.0)
# Recoil, out-of-plane spin term, Campanelli et al. 2007 (ApJ 659, L5; K as refitted by
# Lousto & Zlochower 2009, PRD 79, 064018) (memory):
_C07_K_KMS = 6.0e4
# Recoil, out-of-plane spin term with hang-up corrections, Lousto et al. 2012
# (PRD 85, 084015) (memory):
_L12_V11_KMS = 3677.76
_L12_VA_KMS = 2481.21
_L12_VB_KMS = 1792.45
_L12_VC_KMS = 1506.52

#: final-spin fits selectable by name
FINAL_SPIN_FITS = ("barausse_rezzolla_2009",)
#: radiated-energy fits selectable by name
RADIATION_FITS = ("barausse_morozova_rezzolla_2012",)
#: recoil fits selectable by name ("none": no recoil)
RECOIL_FITS = ("lousto_2012", "campanelli_2007", "none")

_SQRT3 = math.sqrt(3.0)


# =============================================================================================
# Plain formulas
# =============================================================================================
def chirp_mass(m1, m2) -> np.ndarray:
    """Chirp mass ``(m1 m2)^(3/5) / (m1 + m2)^(1/5)``, in the unit of the masses.

    Parameters
    ----------
    m1, m2 : array_like
        Component masses (any order), e.g. Msun, >= 0.

    Returns
    -------
    numpy.ndarray
        Chirp mass, float64, broadcast shape: the mass combination that sets the
        leading-order gravitational-wave frequency evolution ([P64]_). Source-frame masses
        give the source-frame chirp mass; multiply by ``1 + z`` for the detector frame.
    """
    m1 = np.asarray(m1, dtype=np.float64)
    m2 = np.asarray(m2, dtype=np.float64)
    mt = m1 + m2
    with np.errstate(divide="ignore", invalid="ignore"):
        # M_c = (m1 m2)^(3/5) / (m1 + m2)^(1/5)  (Peters & Mathews 1963; Peters 1964)
        return np.where(mt > 0.0, (m1 * m2) ** 0.6 / np.where(mt > 0.0, mt, 1.0) ** 0.2, 0.0)


def symmetric_mass_ratio(q) -> np.ndarray:
    """Symmetric mass ratio ``eta = q / (1 + q)^2`` for ``q = m2 / m1`` (0.25 at ``q = 1``)."""
    q = np.asarray(q, dtype=np.float64)
    return q / (1.0 + q) ** 2


def _pair(q, chi1, chi2):
    """Broadcast ``q`` (n,) and spins (n, 3)."""
    q = np.atleast_1d(np.asarray(q, dtype=np.float64))
    chi1 = np.asarray(chi1, dtype=np.float64)
    chi2 = np.asarray(chi2, dtype=np.float64)
    if chi1.shape[-1:] != (3,) or chi2.shape[-1:] != (3,):
        raise ValueError("spins must be vectors of shape (n, 3); got "
                         f"{chi1.shape} and {chi2.shape}")
    n = np.broadcast_shapes(q.shape, chi1.shape[:-1], chi2.shape[:-1])
    q = np.broadcast_to(q, n)
    return q, np.broadcast_to(chi1, n + (3,)), np.broadcast_to(chi2, n + (3,))


def final_spin_vector(q, chi1, chi2) -> np.ndarray:
    """Spin vector of the remnant (Barausse & Rezzolla 2009).

    ``a_fin = (a1 + q^2 a2 + q l) / (1 + q)^2`` with ``l = |l| z_hat`` along the orbital
    angular momentum and

    ``|l| = s4 / (1 + q^2)^2 (|a1|^2 + q^4 |a2|^2 + 2 q^2 a1.a2)
    + (s5 eta + t0 + 2) / (1 + q^2) (a1_z + q^2 a2_z) + 2 sqrt(3) + t2 eta + t3 eta^2``

    ([BR09]_; aligned-spin coefficients from [R08]_; ``s4 = -0.1229``, ``s5 = 0.4537``,
    ``t0 = -2.8904``, ``t2 = -3.5171``, ``t3 = 2.5763``, memory). It gives 0.6865 for
    equal non-spinning masses and tends to ``a1`` as ``q -> 0``. Where the fit exceeds the
    Kerr bound (near-extremal spins aligned with the orbit at small ``q``, by up to ~1.3%),
    the vector is scaled back to unit length.

    Parameters
    ----------
    q : array_like
        Mass ratio ``m2 / m1`` in [0, 1], shape (n,).
    chi1, chi2 : array_like
        Spin vectors of the heavier and lighter hole, shape (n, 3), z along the orbital
        angular momentum.

    Returns
    -------
    numpy.ndarray
        Remnant spin vectors, shape (n, 3); the magnitude (<= 1) is the remnant spin.
    """
    q, a1, a2 = _pair(q, chi1, chi2)
    eta = symmetric_mass_ratio(q)
    q2 = q * q
    a1sq = np.einsum("...i,...i->...", a1, a1)
    a2sq = np.einsum("...i,...i->...", a2, a2)
    a12 = np.einsum("...i,...i->...", a1, a2)
    # |l| (Barausse & Rezzolla 2009, ApJ 704, L40, eq. 10, with |a_i| cos(angles) written as
    # dot products; memory)
    ell = (_BR09_S4 / (1.0 + q2) ** 2 * (a1sq + q2 * q2 * a2sq + 2.0 * q2 * a12)
           + (_BR09_S5 * eta + _BR09_T0 + 2.0) / (1.0 + q2) * (a1[..., 2] + q2 * a2[..., 2])
           + 2.0 * _SQRT3 + _BR09_T2 * eta + _BR09_T3 * eta * eta)
    # a_fin = (a1 + a2 q^2 + l q) / (1 + q)^2  (Barausse & Rezzolla 2009, eq. 5)
    vec = a1 + q2[..., None] * a2
    vec[..., 2] += q * ell
    vec /= ((1.0 + q) ** 2)[..., None]
    # the fit overshoots the Kerr bound by up to ~1.3% for near-extremal aligned spins at
    # small q (e.g. 1.012 for a1 = 1, q = 0.05): scale such vectors back to |a_fin| = 1
    norm = np.sqrt(np.einsum("...i,...i->...", vec, vec))
    return vec / np.maximum(norm, 1.0)[..., None]


def radiated_fraction(q, chi1, chi2) -> np.ndarray:
    """Fraction of the binary's mass radiated in gravitational waves (Barausse et al. 2012).

    ``E_rad / M = [1 - E_isco(a)] eta + 4 eta^2 [4 p0 + 16 p1 a (a + 1) + E_isco(a) - 1]``
    with ``a = (a1_z + q^2 a2_z) / (1 + q)^2`` (the total spin along the orbital angular
    momentum over ``M^2``), the specific binding energy at the Kerr ISCO
    ``E_isco = (1 - 2 / (3 r_isco(a)))^(1/2)`` ([BPT72]_) and ``p0 = 0.04827``,
    ``p1 = 0.01707`` ([BMR12]_, memory). The test-particle limit ``eta [1 - E_isco(a1)]`` is
    exact; equal non-spinning masses give ``p0``.

    Parameters
    ----------
    q, chi1, chi2 : array_like
        As in :func:`final_spin_vector`.

    Returns
    -------
    numpy.ndarray
        ``E_rad / (m1 + m2)``, shape (n,).
    """
    q, a1, a2 = _pair(q, chi1, chi2)
    eta = symmetric_mass_ratio(q)
    a = (a1[..., 2] + q * q * a2[..., 2]) / (1.0 + q) ** 2
    a = np.clip(a, -1.0, 1.0)
    # E_isco = (1 - 2/(3 r_isco))^(1/2)  (Bardeen, Press & Teukolsky 1972, ApJ 178, 347)
    e_isco = np.sqrt(1.0 - 2.0 / (3.0 * r_isco(a)))
    # E_rad/M (Barausse, Morozova & Rezzolla 2012, ApJ 758, 63; memory)
    return ((1.0 - e_isco) * eta
            + 4.0 * eta * eta * (4.0 * _BMR12_P0 + 16.0 * _BMR12_P1 * a * (a + 1.0)
                                 + e_isco - 1.0))


def recoil_vector_kms(q, chi1, chi2, fit: str = DEFAULT_RECOIL_FIT) -> np.ndarray:
    """Recoil velocity of the remnant, km/s.

    ``V = (v_m + v_perp cos xi) e1 + v_perp sin xi e2 + v_par z_hat`` ([C07]_) with

    * ``v_m = A eta^2 (1 - q) / (1 + q) (1 + B eta)``, ``A = 1.2e4 km/s``, ``B = -0.93``
      ([G07]_, memory): 175 km/s at most, near ``q = 0.36``;
    * ``v_perp = H eta^2 / (1 + q) (a1_z - q a2_z)``, ``H = 6.9e3 km/s``, ``xi = 145 deg``
      ([LZ08]_, memory);
    * ``"campanelli_2007"``: ``v_par = K eta^2 / (1 + q) |D| cos(phi_D)``,
      ``K = 6.0e4 km/s`` ([C07]_, memory);
    * ``"lousto_2012"``: ``v_par = 16 eta^2 / (1 + q) [V11 + VA S + VB S^2 + VC S^3] |D|
      cos(phi_D)`` with ``S = 2 (a1_z + q^2 a2_z) / (1 + q)^2``, ``V11 = 3677.76``,
      ``VA = 2481.21``, ``VB = 1792.45``, ``VC = 1506.52 km/s`` ([L12]_, memory);

    where ``D = a1_perp - q a2_perp`` is the in-plane part of the spin difference (heavier
    hole first; the direction of ``Delta = M (S_big/m_big - S_small/m_small)``) and
    ``phi_D`` its azimuth from the x axis of the spin frame (see the module notes).
    ``"none"`` returns zeros.

    Parameters
    ----------
    q, chi1, chi2 : array_like
        As in :func:`final_spin_vector`.
    fit : {"lousto_2012", "campanelli_2007", "none"}, optional
        Out-of-plane term.

    Returns
    -------
    numpy.ndarray
        Recoil vectors (e1, e2, z components), km/s, shape (n, 3).
    """
    _validate.one_of("recoil_vector_kms", "fit", fit, RECOIL_FITS)
    q, a1, a2 = _pair(q, chi1, chi2)
    out = np.zeros(q.shape + (3,))
    if fit == "none":
        return out
    eta = symmetric_mass_ratio(q)
    eta2 = eta * eta
    # v_m = A eta^2 sqrt(1 - 4 eta) (1 + B eta), sqrt(1 - 4 eta) = (1 - q)/(1 + q)
    # (González et al. 2007, PRL 98, 091101)
    v_m = _G07_A_KMS * eta2 * (1.0 - q) / (1.0 + q) * (1.0 + _G07_B * eta)
    # v_perp = H eta^2/(1 + q) (a_big,z - q a_small,z)  (Campanelli et al. 2007, ApJ 659, L5
    # form; H and xi of Lousto & Zlochower 2008, PRD 77, 044028)
    v_perp = _LZ08_H_KMS * eta2 / (1.0 + q) * (a1[..., 2] - q * a2[..., 2])
    # |D| cos(phi_D) = D_x: the in-plane spin difference projected on the x axis
    d_cos = a1[..., 0] - q * a2[..., 0]
    if fit == "campanelli_2007":
        # v_par = K eta^2/(1 + q) |a_big,perp - q a_small,perp| cos(Theta - Theta_0)
        # (Campanelli et al. 2007, ApJ 659, L5)
        v_par = _C07_K_KMS * eta2 / (1.0 + q) * d_cos
    else:
        s = 2.0 * (a1[..., 2] + q * q * a2[..., 2]) / (1.0 + q) ** 2
        # v_par = 16 eta^2/(1+q) [V11 + VA S + VB S^2 + VC S^3] |D_perp| cos(phi_D - phi_1)
        # (Lousto, Zlochower, Dotti & Volonteri 2012, PRD 85, 084015)
        poly = _L12_V11_KMS + s * (_L12_VA_KMS + s * (_L12_VB_KMS + s * _L12_VC_KMS))
        v_par = 16.0 * eta2 / (1.0 + q) * poly * d_cos
    out[..., 0] = v_m + v_perp * math.cos(_LZ08_XI_RAD)
    out[..., 1] = v_perp * math.sin(_LZ08_XI_RAD)
    out[..., 2] = v_par
    return out


# =============================================================================================
# Spins at merger
# =============================================================================================
@dataclass(frozen=True)
class SpinDraw:
    """Spin magnitudes and orientations of the two black holes at coalescence.

    Orientations are given by the angle ``theta`` between each spin and the orbital angular
    momentum (z axis) and an azimuth ``phi``, drawn independently for the two holes:

    * aligned (gas-rich): ``cos theta`` uniform in ``[cos theta_max, 1]`` (isotropic within a
      cone of half-angle ``theta_max``) -- torques from circumnuclear gas align the spins with
      the orbit before coalescence ([BRM07]_), to within ~10 deg in cold and ~30 deg in hot
      discs ([D10]_, memory);
    * random (gas-poor): ``cos theta`` uniform in [-1, 1] (isotropic);

    and ``phi`` uniform in [0, 2 pi) in both cases.

    Parameters
    ----------
    orientation : {"by_gas", "aligned", "random"}, optional
        ``"by_gas"`` (default): aligned where the gas fraction exceeds
        ``gas_fraction_threshold``, random elsewhere; ``"aligned"`` or ``"random"`` for all.
    magnitude : {"own", "uniform"}, optional
        ``"own"`` (default): the black holes' tracked spins ``|a|``; ``"uniform"``: drawn
        uniformly in [``magnitude_min``, ``magnitude_max``] (equal ends give a fixed value).
    gas_fraction_threshold : float, optional
        Gas fraction in [0, 1] above which a merger is gas-rich (default 0.1, a stated choice).
    aligned_max_angle_deg : float, optional
        Largest spin-orbit angle of aligned spins, degrees in [0, 90] (default 10, [D10]_).
    magnitude_min : float, optional
        Lower end of uniformly drawn spin magnitudes, in [0, 1] (default 0).
    magnitude_max : float, optional
        Upper end of uniformly drawn spin magnitudes, in [0, 1] (default 0.998, [T74]_).

    Notes
    -----
    :meth:`draw` uses ``N_UNIFORMS = 6`` uniforms per merger, columns
    ``(cos theta_1, phi_1, cos theta_2, phi_2, |a_1|, |a_2|)``; the magnitude columns are
    used only with ``magnitude = "uniform"``.
    """

    orientation: str = DEFAULT_SPIN_ORIENTATION
    magnitude: str = DEFAULT_SPIN_MAGNITUDE
    gas_fraction_threshold: float = DEFAULT_GAS_FRACTION_THRESHOLD
    aligned_max_angle_deg: float = DEFAULT_ALIGNED_MAX_ANGLE_DEG
    magnitude_min: float = DEFAULT_MAGNITUDE_MIN
    magnitude_max: float = DEFAULT_MAGNITUDE_MAX

    #: uniforms used per merger by :meth:`draw`
    N_UNIFORMS: ClassVar[int] = 6

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "orientation", self.orientation, ("by_gas", "aligned", "random"))
        _validate.one_of(owner, "magnitude", self.magnitude, ("own", "uniform"))
        for name, lo, hi in (("gas_fraction_threshold", 0.0, 1.0),
                             ("aligned_max_angle_deg", 0.0, 90.0),
                             ("magnitude_min", 0.0, 1.0), ("magnitude_max", 0.0, 1.0)):
            object.__setattr__(self, name, _validate.in_range(owner, name, getattr(self, name),
                                                              lo, hi))
        if self.magnitude_min > self.magnitude_max:
            raise ParameterError(
                f"`magnitude_min` of {owner} must be <= magnitude_max "
                f"({self.magnitude_max!r}); got {self.magnitude_min!r}",
                source=owner, rule="magnitude_min")

    def is_aligned(self, gas_fraction) -> np.ndarray:
        """Boolean array: which mergers get aligned spins (``gas_fraction > threshold`` in
        ``"by_gas"`` mode; all or none otherwise)."""
        f = np.asarray(gas_fraction, dtype=np.float64)
        if self.orientation == "aligned":
            return np.ones(f.shape, dtype=bool)
        if self.orientation == "random":
            return np.zeros(f.shape, dtype=bool)
        return f > self.gas_fraction_threshold

    def draw(self, a1_mag, a2_mag, gas_fraction, u):
        """Spin vectors of both holes at merger.

        Parameters
        ----------
        a1_mag, a2_mag : array_like
            Tracked spin magnitudes of the two holes, in [0, 1], shape (n,) (used with
            ``magnitude = "own"``; signs are dropped).
        gas_fraction : array_like
            Gas fraction of the host, shape (n,) (a boolean "gas-rich" array also works,
            read as 1/0, for thresholds below 1). Ignored unless ``orientation = "by_gas"``.
        u : array_like
            Uniforms in [0, 1), shape (n, k) with ``k >= 6`` (columns in the class notes),
            e.g. from :func:`bhgrow.rng.uniform`.

        Returns
        -------
        chi1, chi2 : numpy.ndarray
            Spin vectors, shape (n, 3), z along the orbital angular momentum.
        """
        u = np.asarray(u, dtype=np.float64)
        if u.ndim != 2 or u.shape[1] < self.N_UNIFORMS:
            raise ValueError(f"SpinDraw.draw needs uniforms of shape (n, >= {self.N_UNIFORMS});"
                             f" got {u.shape}")
        n = u.shape[0]
        aligned = np.broadcast_to(self.is_aligned(gas_fraction), (n,))
        if self.magnitude == "own":
            mags = [np.broadcast_to(np.abs(np.asarray(a, dtype=np.float64)), (n,))
                    for a in (a1_mag, a2_mag)]
        else:
            lo, hi = self.magnitude_min, self.magnitude_max
            mags = [lo + (hi - lo) * u[:, 4], lo + (hi - lo) * u[:, 5]]
        # aligned: cos(theta) uniform in [cos theta_max, 1] (isotropic within the cone;
        # Bogdanović, Reynolds & Miller 2007; Dotti et al. 2010); random: in [-1, 1]
        cos_min = np.where(aligned, math.cos(math.radians(self.aligned_max_angle_deg)), -1.0)
        out = []
        for mag, uc, up in zip(mags, (u[:, 0], u[:, 2]), (u[:, 1], u[:, 3])):
            c = 1.0 - (1.0 - cos_min) * uc
            s = np.sqrt(np.maximum(1.0 - c * c, 0.0))
            phi = 2.0 * math.pi * up
            out.append(mag[:, None] * np.stack([s * np.cos(phi), s * np.sin(phi), c], axis=1))
        return out[0], out[1]


# =============================================================================================
# Remnant
# =============================================================================================
class Remnant(NamedTuple):
    """Result of :meth:`RemnantModel.remnant` (arrays of shape (n,)).

    Attributes
    ----------
    mass_msun : numpy.ndarray
        Remnant mass ``m1 + m2 - radiated_msun``, Msun.
    spin : numpy.ndarray
        Remnant spin magnitude in [0, 1].
    kick_kms : numpy.ndarray
        Recoil speed, km/s.
    radiated_msun : numpy.ndarray
        Mass-energy radiated in gravitational waves, Msun.
    """

    mass_msun: np.ndarray
    spin: np.ndarray
    kick_kms: np.ndarray
    radiated_msun: np.ndarray


@dataclass(frozen=True)
class RemnantModel:
    """Mass, spin and recoil of the remnant of a black-hole coalescence.

    Parameters
    ----------
    final_spin : {"barausse_rezzolla_2009"}, optional
        Final-spin fit (:func:`final_spin_vector`, [BR09]_).
    radiation : {"barausse_morozova_rezzolla_2012"}, optional
        Radiated-energy fit (:func:`radiated_fraction`, [BMR12]_).
    recoil : {"lousto_2012", "campanelli_2007", "none"}, optional
        Recoil fit (:func:`recoil_vector_kms`; default ``"lousto_2012"``, [L12]_).
    """

    final_spin: str = FINAL_SPIN_FITS[0]
    radiation: str = RADIATION_FITS[0]
    recoil: str = DEFAULT_RECOIL_FIT

    #: uniforms used per merger by :meth:`remnant` (none: the kick phase comes from the spin
    #: azimuths drawn by :class:`SpinDraw`)
    N_UNIFORMS: ClassVar[int] = 0

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _validate.one_of(owner, "final_spin", self.final_spin, FINAL_SPIN_FITS)
        _validate.one_of(owner, "radiation", self.radiation, RADIATION_FITS)
        _validate.one_of(owner, "recoil", self.recoil, RECOIL_FITS)

    def remnant(self, m1, m2, chi1, chi2, u=None) -> Remnant:
        """Remnants of coalescing pairs, vectorized over pairs.

        Parameters
        ----------
        m1, m2 : array_like
            Masses of the two holes, Msun (> 0), shape (n,), in either order (pairs with
            ``m2 > m1`` are swapped together with their spins).
        chi1, chi2 : array_like
            Their spin vectors, shape (n, 3), z along the orbital angular momentum (e.g. from
            :meth:`SpinDraw.draw`).
        u : array_like, optional
            Not used (``N_UNIFORMS = 0``): the phase of the out-of-plane kick is the azimuth
            of the drawn spins. Accepted so that callers can pass their uniforms.

        Returns
        -------
        Remnant
            ``(mass_msun, spin, kick_kms, radiated_msun)``; ``mass_msun + radiated_msun``
            equals ``m1 + m2`` to round-off.
        """
        m1 = np.atleast_1d(np.asarray(m1, dtype=np.float64))
        m2 = np.atleast_1d(np.asarray(m2, dtype=np.float64))
        chi1 = np.asarray(chi1, dtype=np.float64)
        chi2 = np.asarray(chi2, dtype=np.float64)
        swap = m2 > m1
        big, small = np.where(swap, m2, m1), np.where(swap, m1, m2)
        a_big = np.where(swap[:, None], chi2, chi1)
        a_small = np.where(swap[:, None], chi1, chi2)
        m_tot = big + small
        q = small / big
        spin = np.linalg.norm(final_spin_vector(q, a_big, a_small), axis=-1)
        radiated = m_tot * radiated_fraction(q, a_big, a_small)
        kick = np.linalg.norm(recoil_vector_kms(q, a_big, a_small, self.recoil), axis=-1)
        return Remnant(m_tot - radiated, spin, kick, radiated)
