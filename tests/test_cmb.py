"""CMB heating and contrast (sedtemp.cmb, da Cunha et al. 2013)."""

import numpy as np

from sedtemp import cmb, models
from sedtemp.constants import T_CMB0


def test_cmb_only_dust_sits_at_the_cmb_temperature():
    # Exact analytic solution: dust heated by the CMB alone has T_d(z) = T_CMB0 (1 + z)
    # (da Cunha et al. 2013, eq. 12), for any beta.
    for z in (0.5, 3.0):
        np.testing.assert_allclose(cmb.cmb_heated_temperature(T_CMB0, 1.8, z).value, T_CMB0 * (1 + z), rtol=1e-12)
        np.testing.assert_allclose(cmb.cmb_temperature(z).value, T_CMB0 * (1 + z), rtol=0)


def test_models_reexport_the_cmb_functions():
    assert models.cmb_contrast_factor is cmb.cmb_contrast_factor
    assert models.T_CMB0 == T_CMB0
