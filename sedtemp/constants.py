"""Physical constants and conventions used by more than one module (SI floats).

One source of truth: every module that needs one of these imports it from
here, never redefines it.
"""

from __future__ import annotations

import astropy.constants as const

__all__ = [
    "T_CMB0",
    "M_HYDROGEN",
    "M_SUN",
    "L_SUN",
    "DEFAULT_GAS_TO_DUST",
    "DEFAULT_GRAIN_DENSITY",
    "MU_H2",
    "NU_LYMAN",
]

#: Present-day CMB temperature in K (Fixsen 2009, ApJ 707, 916, eq. 3; from memory).
T_CMB0 = 2.72548
#: Mass of the hydrogen atom in kg: m_p + m_e (the 13.6 eV binding energy,
#: a relative 1.5e-8, is neglected).
M_HYDROGEN = float(const.m_p.si.value + const.m_e.si.value)
#: Solar mass (kg) and luminosity (W), IAU 2015 nominal values via astropy.
M_SUN = float(const.M_sun.si.value)
L_SUN = float(const.L_sun.si.value)
#: Default gas-to-dust mass ratio (common practice for the Milky Way).
DEFAULT_GAS_TO_DUST = 100.0
#: Default material density of a grain in kg m^-3: 3.0 g cm^-3, between
#: graphite (2.2) and silicate (3.5 g cm^-3); common practice. Used by the UV
#: cap of the opacity and by the default grain alike.
DEFAULT_GRAIN_DENSITY = 3000.0
#: Mean molecular weight per H2 molecule, 2.8 (Kauffmann et al. 2008, A&A 487,
#: 993, appendix A; from memory).
MU_H2 = 2.8
#: Frequency of the Lyman limit (13.6 eV) in Hz, where the interstellar field stops.
NU_LYMAN = float((13.6 * const.e.si.value) / const.h.si.value)
