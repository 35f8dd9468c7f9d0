"""Physical constants, each defined once with its source.

Fundamental constants come from ``scipy.constants`` (CODATA recommended values as shipped
by the installed SciPy). Derived radiation constants are expressed for wavenumbers in cm⁻¹
and radiances in mW m⁻² sr⁻¹ (cm⁻¹)⁻¹, the customary units of infrared sounding.
"""
from scipy import constants as _sc

#: Planck constant [J s] (CODATA, via scipy.constants)
PLANCK_H = _sc.h
#: Speed of light in vacuum [m s⁻¹] (exact, SI)
SPEED_OF_LIGHT = _sc.c
#: Boltzmann constant [J K⁻¹] (exact, SI)
BOLTZMANN_K = _sc.k
#: Avogadro constant [mol⁻¹] (exact, SI)
AVOGADRO = _sc.N_A
#: Molar gas constant [J mol⁻¹ K⁻¹] (CODATA, via scipy.constants)
MOLAR_GAS_CONSTANT = _sc.R
#: Standard acceleration of gravity [m s⁻²] (CGPM 1901, via scipy.constants)
GRAVITY = _sc.g

#: First radiation constant for radiance per wavenumber, 2 h c² [mW m⁻² sr⁻¹ cm⁴].
#: 2hc² in W m² sr⁻¹ becomes mW m⁻² sr⁻¹ (cm⁻¹)⁻⁴ × 1e8 (m⁻¹→cm⁻¹, cubed and once more
#: for "per cm⁻¹") × 1e3 (W→mW) = × 1e11.
C1_RADIANCE = 2.0 * PLANCK_H * SPEED_OF_LIGHT**2 * 1.0e11
#: Second radiation constant h c / k [cm K] (m K × 100).
C2_CM_K = PLANCK_H * SPEED_OF_LIGHT / BOLTZMANN_K * 100.0

#: Molar mass of dry air [kg mol⁻¹] (US Standard Atmosphere 1976, Table 3 mean molecular weight 28.9644)
MOLAR_MASS_DRY_AIR = 28.9644e-3
#: Molar mass of water [kg mol⁻¹] (IAPWS, 18.015268 g mol⁻¹)
MOLAR_MASS_WATER = 18.015268e-3
#: Specific gas constant of dry air [J kg⁻¹ K⁻¹]
R_DRY_AIR = MOLAR_GAS_CONSTANT / MOLAR_MASS_DRY_AIR
#: Ratio of molar masses, water / dry air (≈ 0.622) [1]
EPSILON = MOLAR_MASS_WATER / MOLAR_MASS_DRY_AIR

#: Standard atmosphere [hPa] (exact, via scipy.constants)
STANDARD_PRESSURE_HPA = _sc.atm / 100.0
#: Reference temperature of the water-vapour continuum coefficients [K]
#: (Roberts, Selby & Biberman 1976 tabulate at 296 K)
CONTINUUM_REFERENCE_T = 296.0
#: Diffusivity factor for the flux-equivalent slant path (Elsasser 1942; common practice)
DIFFUSIVITY_FACTOR = 1.66
