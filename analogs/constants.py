"""Physical constants, each with its source. Every module takes them from here."""

#: Standard gravity, m s-2 (3rd CGPM 1901; WMO).
G0 = 9.80665
#: Earth's angular velocity, rad s-1 (WGS84).
OMEGA = 7.292115e-5
#: Mean Earth radius, m (IUGG mean radius R1 of the WGS84 ellipsoid).
EARTH_RADIUS = 6371008.8
#: Ratio of the gas constants of dry air and water vapour, Rd/Rv (dimensionless).
EPSILON = 0.622
#: Bolton (1980) saturation vapour pressure constants: es = A exp(B T / (T + C)), T in deg C, es in hPa.
BOLTON_A_HPA = 6.112
BOLTON_B = 17.67
BOLTON_C_DEGC = 243.5
#: 0 deg C in kelvin.
ZERO_CELSIUS_K = 273.15
#: 60 deg F dewpoint in deg C: moisture rich enough for surface-based severe storms (common practice, no source).
SEVERE_DEWPOINT_C = (60.0 - 32.0) * 5.0 / 9.0
#: Neighbourhood radius for "near a point" probabilities: 40 km, about 25 statute miles (common practice).
NEIGHBOURHOOD_KM = 40.0
#: Gaussian sigma of a practically perfect hindcast, km (Brooks et al. 1998, from memory).
PRACTICALLY_PERFECT_SIGMA_KM = 120.0
#: Hour (UTC) at which a convective day starts: 12 UTC to 12 UTC (common practice).
CONVECTIVE_DAY_START_HOUR = 12
#: Density of liquid water that turns a water depth into a mass per area, kg m-3: 1 mm of
#: precipitable water = 1 kg m-2 (the "lwe" standard names of the CF conventions; from memory).
WATER_DENSITY = 1000.0
