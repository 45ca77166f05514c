"""Named unit conversions and physical constants: the one place a factor between units is written.

Inside the package each quantity has one unit, named in the parameter (``depth_mm``,
``mu_a_per_cm``); conversions happen at the edges with these names instead of bare factors.
Physical constants come from :mod:`scipy.constants` (CODATA 2018 exact values for h and c), never
typed by hand.

Examples
--------
>>> 12.0 / MM_PER_CM  # 12 mm in cm
1.2
>>> round(HC_EV_NM, 3)  # photon energy (eV) times wavelength (nm)
1239.842
"""

from __future__ import annotations

from scipy import constants as _c

__all__ = [
    "MM_PER_CM", "CM_PER_M", "UM_PER_MM", "UM_PER_CM", "NM_PER_UM", "M_PER_NM", "M_PER_UM", "UM_PER_M",
    "MW_PER_W", "W_PER_MW", "MEV_PER_EV", "G_PER_KG", "MG_PER_G", "UL_PER_ML", "S_PER_MIN", "PERCENT",
    "PLANCK_J_S", "LIGHT_SPEED_M_PER_S", "HC_EV_NM",
]

# lengths
MM_PER_CM = 10.0
CM_PER_M = 100.0
UM_PER_MM = 1000.0
UM_PER_CM = 1.0e4
NM_PER_UM = 1000.0
M_PER_NM = _c.nano
M_PER_UM = _c.micro
UM_PER_M = 1.0e6
# power, energy, mass, volume, time, fractions
MW_PER_W = 1000.0
W_PER_MW = _c.milli
MEV_PER_EV = 1000.0
G_PER_KG = 1000.0
MG_PER_G = 1000.0
UL_PER_ML = 1000.0
S_PER_MIN = _c.minute
PERCENT = 100.0

#: Planck constant (J s) and speed of light in vacuum (m/s), CODATA exact values via scipy.constants.
PLANCK_J_S = _c.h
LIGHT_SPEED_M_PER_S = _c.c
#: h c in eV nm: a photon of wavelength λ (nm) carries HC_EV_NM / λ eV.
HC_EV_NM = _c.h * _c.c / (_c.e * _c.nano)
