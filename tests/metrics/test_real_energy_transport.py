"""The energy transport on real open data, recomputed by plain numpy written here.

Source: ``nc4uvt.nc`` from Debian's ``libncarg-data`` package (the data files of the NCAR Command
Language): a January monthly mean (time "Month since Jan 1988") of U, V and T on 14 pressure levels
(1000-10 hPa) on a 64 x 128 Gaussian grid. It has no geopotential height and no humidity, which the
metric needs, so the test adds them to a copy: the geopotential height from the file's own
temperature by the hypsometric equation (dry air, 0 m at 1000 hPa: the mass correction makes the
transport independent of that constant) and a specific humidity of 0, so the value checked is the
dry static energy transport of the real winds and temperatures, F = 2 pi a cos(lat)/g ([integral v E
dp] - [integral v dp] [integral E dp] / (p_bottom - p_top)), E = cp T + g z (Trenberth 1991, J.
Climate 4, 707-722, the barotropic mass correction; cp and g as in tests/metrics/test_transport.py's
named sources). A monthly mean holds only the mean circulation and the stationary eddies, so the
rows keep their value with the flag time_step_unknown (one time step).
"""

import os

import netCDF4
import numpy as np
import pytest

from circtrack import config, engine

from .test_real_upper_air import fixed_copy

SOURCE = "/usr/share/ncarg/data/cdf/nc4uvt.nc"        # Debian libncarg-data
pytestmark = pytest.mark.skipif(not os.path.exists(SOURCE), reason="Debian package libncarg-data not installed "
                                "(apt-get install libncarg-data); real energy-transport check skipped")

A, G, CP, RD = 6.371e6, 9.80665, 1004.64, 287.04      # m, m s-2, J kg-1 K-1 (dry air), J kg-1 K-1


@pytest.fixture(scope="module")
def path(tmp_path_factory):
    p = fixed_copy(tmp_path_factory.mktemp("energy") / "uvt_jan_zq.nc")    # time and T units fixed
    with netCDF4.Dataset(p, "a") as f:
        lev = np.asarray(f["lev"][:], float)           # 1000 ... 10 hPa, bottom first
        t = np.asarray(f["T"][:], float)
        z = np.zeros_like(t)
        for k in range(1, lev.size):                   # hypsometric: dz = Rd/g * mean T * ln(p_below / p_above)
            z[:, k] = z[:, k - 1] + RD / G * 0.5 * (t[:, k] + t[:, k - 1]) * np.log(lev[k - 1] / lev[k])
        zg = f.createVariable("zg", "f4", f["T"].dimensions)
        zg.setncatts({"standard_name": "geopotential_height", "units": "m"})
        zg[:] = z
        q = f.createVariable("hus", "f4", f["T"].dimensions)
        q.setncatts({"standard_name": "specific_humidity", "units": "kg kg-1"})
        q[:] = 0.0
    return str(p)


def _numpy_transport(path):
    """(lat, F in PW) by numpy from the file: column integrals by np.trapezoid over p (Pa, top first) at
    every longitude, zonal means, the barotropic mass correction."""
    with netCDF4.Dataset(path) as f:
        p = np.asarray(f["lev"][:], float) * 100.0
        lat = np.asarray(f["lat"][:], float)
        v, t, z = (np.asarray(f[k][0], np.float64) for k in ("V", "T", "zg"))
    o = np.argsort(p)                                   # top first
    p, v, t, z = p[o], v[o], t[o], z[o]
    e = CP * t + G * z
    ive = np.trapezoid(v * e, p, axis=0).mean(axis=-1)      # (J,)
    iv = np.trapezoid(v, p, axis=0).mean(axis=-1)
    ie = np.trapezoid(e, p, axis=0).mean(axis=-1)
    depth = p[-1] - p[0]
    f_w = 2 * np.pi * A * np.cos(np.deg2rad(lat)) / G * (ive - iv * ie / depth)
    return lat, f_w / 1e15


def _peak(lat, poleward_f, lo=10.0, hi=80.0, sign=1.0):
    """Maximum of the poleward transport over |lat| in [lo, hi], refined by the parabola through it
    and its two neighbours (np.polyfit on the actual latitudes)."""
    inside = np.flatnonzero((sign * lat >= lo) & (sign * lat <= hi))
    k = inside[np.argmax(poleward_f[inside])]
    c = np.polyfit(lat[k - 1:k + 2], poleward_f[k - 1:k + 2], 2)
    x = -c[1] / (2 * c[0])
    return x, np.polyval(c, x)


def test_energy_transport_of_real_winds_and_temperatures_recomputed_by_numpy(path):
    out = engine.track([path], config.load(), metric_ids=["energy_transport_max", "energy_transport_max_lat"])
    c = out.columns
    rows = {(c["metric"][i], c["hemisphere"][i]): (float(c["value"][i]), c["flag"][i]) for i in range(len(c["metric"]))}
    lat, f = _numpy_transport(path)
    # SH (austral summer): a poleward peak inside the window (10-80 deg poleward), found by both
    x, peak = _peak(lat, -f, sign=-1.0)
    value, flag = rows[("energy_transport_max", "SH")]
    where, _ = rows[("energy_transport_max_lat", "SH")]
    assert flag == "time_step_unknown"                  # one time step: value kept, transients unknown
    assert value == pytest.approx(peak, rel=1e-4)
    assert where == pytest.approx(x, abs=1e-3)
    assert 1.0 < value < 5.0 and -35.0 < where < -15.0  # about 2.5 PW near 25 S in this file
    # NH (winter): numpy's largest poleward value in the window sits on its first latitude (12.6 N):
    # the winter Hadley cell's dry static energy transport peaks nearer the equator, so the peak may lie
    # outside the window and circtrack gives NaN with the reason
    inside = np.flatnonzero((lat >= 10.0) & (lat <= 80.0))
    assert inside[np.argmax(f[inside])] == inside[0]
    assert np.isnan(rows[("energy_transport_max", "NH")][0])
    assert rows[("energy_transport_max", "NH")][1] == "extremum_at_window_edge"
