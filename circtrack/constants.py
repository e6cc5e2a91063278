"""Physical constants in SI units, in one place.

Values follow SPEC section 5 (a, g) and standard references:
Earth radius a = 6.371e6 m (mean radius), standard gravity g = 9.80665 m s-2 (CGPM 1901),
rotation rate Omega = 7.292115e-5 s-1 (sidereal day), dry-air gas constant and heat capacity
and latent heat of vaporisation as in the U.S. Standard Atmosphere 1976 / WMO tables.
"""

EARTH_RADIUS = 6.371e6          # m
GRAVITY = 9.80665               # m s-2
OMEGA = 7.292115e-5             # s-1, Earth's rotation rate (sidereal)
R_DRY = 287.05                  # J kg-1 K-1, 8.31432 / 0.0289644 (US Standard Atmosphere 1976)
CP_DRY = 1004.64                # J kg-1 K-1, 3.5 * R_DRY (ideal diatomic gas)
LATENT_HEAT_VAPORIZATION = 2.501e6   # J kg-1 at 0 degC
P_REFERENCE = 100000.0          # Pa, reference surface pressure
HPA = 100.0                     # Pa per hPa
PETAWATT = 1.0e15               # W
