"""Physical constants and unit factors used across ebullio, each with its unit and source.

This is the only module that defines a physical constant; everything else imports
from here, so a figure is written, sourced and checked once. It sits in ``drivers/``,
the bottom layer, so that the simulated rig and the thermocouple code may use it
as well as ``monitor/`` (``drivers/`` imports nothing from ``monitor/``). Names end in their
unit (``_K``, ``_KPA``, ``_J_PER_KG_K``...). A value marked "exact" is fixed by a
definition rather than measured. The published source is named beside each group
or value.
"""

from __future__ import annotations

# --- Temperature scale -------------------------------------------------------------

# Kelvin value of 0 °C: t/°C = T/K − 273.15, exact by the definition of the Celsius
# scale, kept by ITS-90.
ZERO_CELSIUS_K = 273.15

# --- Radiation (CODATA 2018) -----------------------------------------------------

# Stefan–Boltzmann constant σ, W/(m²·K⁴). CODATA 2018; exact since the 2019 SI
# (2π⁵k⁴/(15h³c²) with h, k and c exact).
STEFAN_BOLTZMANN_W_PER_M2_K4 = 5.670374419e-8

# --- Gravity and pressure (CGPM; ICAO Doc 7488) ------------------------------------

# Standard acceleration of gravity g0, m/s², exact by convention (CGPM 1901); also
# the g0 of the ICAO standard atmosphere (ICAO Doc 7488).
STANDARD_GRAVITY_M_PER_S2 = 9.80665

# Standard atmosphere, kPa: 1 atm = 101 325 Pa exactly (CGPM 1954); the ICAO
# sea-level pressure p0.
STANDARD_PRESSURE_KPA = 101.325

# --- ICAO standard atmosphere, troposphere (ICAO Doc 7488, 3rd ed. 1993; ISO 2533)

# Sea-level temperature T0, K.
ISA_SEA_LEVEL_TEMPERATURE_K = 288.15

# Sea-level pressure p0, Pa (the same figure as STANDARD_PRESSURE_KPA, in Pa).
ISA_SEA_LEVEL_PRESSURE_PA = 101325.0

# Temperature lapse rate L in the troposphere, K per metre of geopotential
# altitude (temperature falls by L per metre going up).
ISA_LAPSE_RATE_K_PER_M = 0.0065

# Specific gas constant of dry air R, J/(kg·K): R* = 8314.32 J/(kmol·K) divided by
# M = 28.9644 kg/kmol, as ICAO Doc 7488 states it (R* and M from memory, no source checked).
ISA_AIR_GAS_CONSTANT_J_PER_KG_K = 287.05287

# Earth radius r0 used to convert geometric to geopotential altitude,
# H = r0·z/(r0 + z), m (ICAO Doc 7488, "6 356.766 km").
ISA_EARTH_RADIUS_M = 6356766.0

# Top of the ICAO troposphere (first layer), geopotential altitude, m.
ISA_TROPOPAUSE_GEOPOTENTIAL_M = 11000.0

# --- Unit factors (exact by definition) ------------------------------------------------

SECONDS_PER_MINUTE = 60.0
SECONDS_PER_HOUR = 3600.0
SECONDS_PER_DAY = 86400.0
J_PER_KJ = 1000.0
J_PER_WH = 3600.0  # 1 W·h = 3600 J
J_PER_KWH = 3.6e6  # 1 kW·h = 3.6 MJ
PA_PER_KPA = 1000.0
KPA_PER_MPA = 1000.0
