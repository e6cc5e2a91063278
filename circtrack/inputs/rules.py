"""Detection rules as data. Order inside each list is the order of preference.

A variable role (CMIP short name) is found by, in this order:
1. an explicit override (``--var ROLE=NAME`` or ``[variables]`` in the config);
2. the CF ``standard_name`` attribute;
3. an exact variable name from ``names``;
4. the same names compared case-insensitively.
A candidate must also have the right shape: roles with ``levels=True`` need a pressure axis,
the others must not have one (so ``ua`` on levels and ``uas`` near the surface never mix).
"""

VARIABLES = {
    "ua": dict(standard_names=["eastward_wind"], names=["ua", "u", "uwnd", "U", "u_component_of_wind", "UGRD"],
               kind="speed", levels=True, long="eastward wind on pressure levels"),
    "va": dict(standard_names=["northward_wind"], names=["va", "v", "vwnd", "V", "v_component_of_wind", "VGRD"],
               kind="speed", levels=True, long="northward wind on pressure levels"),
    "ta": dict(standard_names=["air_temperature"], names=["ta", "t", "air", "T", "temperature", "TMP"],
               kind="temperature", levels=True, long="air temperature on pressure levels"),
    "zg": dict(standard_names=["geopotential_height", "geopotential"], names=["zg", "z", "hgt", "Z", "Z3", "geopotential", "HGT", "H", "gh"],
               kind="height", levels=True, long="geopotential height on pressure levels"),
    "hus": dict(standard_names=["specific_humidity"], names=["hus", "q", "shum", "Q", "SPFH", "QV"],
                kind="fraction", levels=True, long="specific humidity on pressure levels"),
    "uas": dict(standard_names=["eastward_wind"], names=["uas", "u10", "10u", "uwnd", "U10", "U10M", "UBOT"],
                kind="speed", levels=False, long="near-surface eastward wind"),
    "vas": dict(standard_names=["northward_wind"], names=["vas", "v10", "10v", "vwnd", "V10", "V10M", "VBOT"],
                kind="speed", levels=False, long="near-surface northward wind"),
    "ps": dict(standard_names=["surface_air_pressure"], names=["ps", "sp", "pres", "PS", "PSFC"],
               kind="pressure", levels=False, long="surface air pressure"),
    "psl": dict(standard_names=["air_pressure_at_mean_sea_level", "air_pressure_at_sea_level"],
                names=["psl", "msl", "slp", "prmsl", "mslp", "PSL", "SLP"],
                kind="pressure", levels=False, long="sea-level pressure"),
    "pr": dict(standard_names=["precipitation_flux"], names=["pr", "prate", "precip", "tp", "PRECT"],
               kind="water_flux", levels=False, long="precipitation"),
    "evspsbl": dict(standard_names=["water_evapotranspiration_flux", "water_evaporation_flux"],
                    names=["evspsbl", "evap", "e", "QFLX", "LHTFL"], kind="water_flux", levels=False, long="evaporation"),
    "rlut": dict(standard_names=["toa_outgoing_longwave_flux"], names=["rlut", "olr", "ttr", "FLUT", "ulwrf"],
                 kind="energy_flux", levels=False, long="outgoing longwave radiation at the top of the atmosphere"),
}

# Coordinates: dimension names, standard_name, units (case-insensitive) and axis attribute.
COORDS = {
    "time": dict(names=["time", "valid_time", "t", "Time", "TIME"], standard_names=["time"], axis="T", units=[]),
    "lat": dict(names=["lat", "latitude", "nav_lat", "lats", "LAT", "Latitude", "y"], standard_names=["latitude"], axis="Y",
                units=["degrees_north", "degree_north", "degree_n", "degrees_n", "degreen", "degreesn"]),
    "lon": dict(names=["lon", "longitude", "nav_lon", "lons", "LON", "Longitude", "x"], standard_names=["longitude"], axis="X",
                units=["degrees_east", "degree_east", "degree_e", "degrees_e", "degreee", "degreese"]),
    "plev": dict(names=["plev", "level", "lev", "pressure_level", "isobaricInhPa", "pressure", "pres", "levels"],
                 standard_names=["air_pressure", "atmosphere_hybrid_sigma_pressure_coordinate"], axis="Z", units=[]),
}

# Data streams of one product in one file (e.g. final and provisional), as a dimension or along time.
STREAM_NAMES = ("expver",)
