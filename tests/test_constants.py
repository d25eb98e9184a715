"""Internal constants against handbook values; parameter-validation message format."""

from __future__ import annotations

import pytest

from bhgrow import _validate, constants as c
from bhgrow.errors import BhgrowInputError, ParameterError


def test_gravitational_constant_internal_units():
    # G = 4.3009e-6 kpc (km/s)^2 / Msun (Binney & Tremaine 2008, Table 1.1 / memory)
    assert c.G_KPC_KMS2_MSUN == pytest.approx(4.3009e-6, rel=1e-4)


def test_eddington_luminosity_per_msun():
    # L_Edd = 1.26e38 (M / Msun) erg/s (Rybicki & Lightman 1979, eq. 1.6; memory)
    assert c.L_EDD_PER_MSUN_CGS == pytest.approx(1.257e38, rel=2e-3)


def test_eddington_time():
    # t_Edd = sigma_T c / (4 pi G m_p) = 0.45 Gyr (Salpeter 1964 time-scale; memory: 450 Myr)
    assert c.T_EDD_GYR == pytest.approx(0.4507, rel=2e-3)
    # Salpeter e-folding time for radiative efficiency 0.1 accreting at Eddington:
    # t_e = eps/(1-eps) t_Edd = 50 Myr (memory: ~45-50 Myr in the literature)
    assert 0.1 / 0.9 * c.T_EDD_GYR * 1e3 == pytest.approx(50.1, rel=5e-3)


def test_critical_density():
    # rho_crit,0 = 2.775e11 h^2 Msun / Mpc^3 (PDG 2022, Astrophysical constants; memory)
    assert c.RHO_CRIT0_H2_MSUN_MPC3 == pytest.approx(2.7754e11, rel=1e-4)


def test_kpc_per_kms():
    # 1 kpc / (1 km/s) = 0.9778 Gyr (Binney & Tremaine 2008; memory)
    assert c.KPC_PER_KMS_GYR == pytest.approx(0.97779, rel=1e-4)


def test_validation_message_format():
    with pytest.raises(ParameterError) as err:
        _validate.positive("BondiHoyle", "boost", -3)
    assert str(err.value) == "`boost` of BondiHoyle must be > 0; got -3"
    assert isinstance(err.value, BhgrowInputError)
    with pytest.raises(ParameterError, match=r"must be in \[0, 1\]; got 1.5"):
        _validate.in_range("Thing", "frac", 1.5, 0, 1)
    with pytest.raises(ParameterError, match="a number"):
        _validate.non_negative("Thing", "x", "abc")
    with pytest.raises(ParameterError, match="finite"):
        _validate.positive("Thing", "x", float("nan"))
    with pytest.raises(ParameterError, match="one of 'a', 'b'"):
        _validate.one_of("Thing", "mode", "c", ["a", "b"])
    with pytest.raises(ParameterError, match="an integer"):
        _validate.integer("Thing", "n", 2.5)
    with pytest.raises(ParameterError, match=">= 1"):
        _validate.integer("Thing", "n", 0, minimum=1)
    assert _validate.positive("T", "x", 2) == 2.0
