"""Physical constants and material data, each with its unit and source.

Physics modules take these as defaults; nothing here is configuration.
"""

from scipy import constants as _sc

ALPHA_CU_20 = 0.00393  # 1/K, temperature coefficient of annealed copper at 20 degC, IEC 60028
RHO_CU_20 = 1.0 / 58.0e6  # ohm m, resistivity of annealed copper at 20 degC, IEC 60028
T_REF_CU_C = 20.0  # degC, reference temperature of the IEC 60028 copper values
ZERO_CELSIUS_K = _sc.zero_Celsius  # K, 273.15 (CODATA via scipy.constants)
BOLTZMANN_EV_PER_K = _sc.value("Boltzmann constant in eV/K")  # eV/K, CODATA via scipy.constants
DEVICE_HOURS_PER_FIT = 1.0e9  # h, 1 FIT = 1 failure per 1e9 device-hours, JEDEC JESD85
