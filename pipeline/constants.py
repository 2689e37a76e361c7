"""Physical constants used by altigrade, each with its unit and source.

| name | symbol | units | value | source |
|---|---|---|---|---|
| ``P0_PA`` | P0 | Pa | 101 325 | US Standard Atmosphere 1976 (NOAA/NASA/USAF 1976), Table 1 |
| ``T0_K`` | T0 | K | 288.15 | US Standard Atmosphere 1976, sea-level temperature |
| ``LAPSE_K_PER_M`` | L | K/m' | 0.0065 | US Standard Atmosphere 1976, layer 0 (0–11 km') |
| ``G0_M_S2`` | g0 | m/s² | 9.806 65 | US Standard Atmosphere 1976 (standard gravity) |
| ``M0_KG_MOL`` | M0 | kg/mol | 0.028 964 4 | US Standard Atmosphere 1976, mean molar mass of air |
| ``R_STAR_J_MOL_K`` | R* | J/(mol·K) | 8.314 32 | US Standard Atmosphere 1976 (the 1976 value, not CODATA) |
| ``R0_EARTH_M`` | r0 | m | 6 356 766 | US Standard Atmosphere 1976, effective Earth radius for geopotential |
| ``TROPOPAUSE_H_M`` | H1 | m' | 11 000 | US Standard Atmosphere 1976, top of layer 0 |
| ``EPSILON_WATER_AIR`` | ε | – | 0.621 945 | ratio of molar masses water/dry air, ASHRAE Handbook Fundamentals 2017, ch. 1 eq. 20 |
| ``FT_TO_M`` | – | m/ft | 0.3048 | international foot (exact) |
| ``PA_PER_PSI`` | – | Pa/psi | 6 894.757 293 168 | NIST SP 811, Appendix B |
| ``ZERO_C_K`` | – | K | 273.15 | definition of the Celsius scale |
"""

from __future__ import annotations

__all__ = [
    "P0_PA",
    "T0_K",
    "LAPSE_K_PER_M",
    "G0_M_S2",
    "M0_KG_MOL",
    "R_STAR_J_MOL_K",
    "R0_EARTH_M",
    "TROPOPAUSE_H_M",
    "EPSILON_WATER_AIR",
    "FT_TO_M",
    "PA_PER_PSI",
    "ZERO_C_K",
]

P0_PA = 101_325.0
T0_K = 288.15
LAPSE_K_PER_M = 0.0065
G0_M_S2 = 9.80665
M0_KG_MOL = 0.0289644
R_STAR_J_MOL_K = 8.31432
R0_EARTH_M = 6_356_766.0
TROPOPAUSE_H_M = 11_000.0
EPSILON_WATER_AIR = 0.621945
FT_TO_M = 0.3048
PA_PER_PSI = 6894.757293168
ZERO_C_K = 273.15
