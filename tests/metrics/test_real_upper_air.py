"""Real open data on pressure levels: ``nc4uvt.nc`` from Debian's ``libncarg-data`` package (the data
files of the NCAR Command Language): a January monthly mean (time "Month since Jan 1988") of U, V and
T on 14 levels (1000-10 hPa) on a 64 x 128 Gaussian grid, as a new user would get it: its time units
("Month") are not CF and its temperature says "C" while the values are kelvin (190-311), so the test
copies it and fixes those two attributes, nothing else.

Every check recomputes the value with plain numpy written here (not the kernels) and compares it
with facts from the literature, named beside each check (values from memory say so).
"""

import os
import shutil

import netCDF4
import numpy as np
import pytest

from circtrack import config, engine

SOURCE = "/usr/share/ncarg/data/cdf/nc4uvt.nc"        # Debian libncarg-data
pytestmark = pytest.mark.skipif(not os.path.exists(SOURCE), reason="Debian package libncarg-data not installed "
                                "(apt-get install libncarg-data); real upper-air checks skipped")

A, G = 6.371e6, 9.80665


def fixed_copy(p):
    """A copy of the source at ``p`` with its two wrong attributes fixed (see the module docstring)."""
    shutil.copy(SOURCE, p)
    with netCDF4.Dataset(p, "a") as f:
        f["time"].units = "days since 1988-01-01"      # "Month" in the file
        f["T"].units = "K"                             # "C" in the file, values in kelvin
    return str(p)


@pytest.fixture(scope="module")
def path(tmp_path_factory):
    return fixed_copy(tmp_path_factory.mktemp("uvt") / "uvt_jan.nc")


@pytest.fixture(scope="module")
def zonal(path):
    """Zonal means by numpy, levels top first: p (hPa), lat, [u], [v], [T] as (L, J)."""
    with netCDF4.Dataset(path) as f:
        p = np.asarray(f["lev"][:], float)
        lat = np.asarray(f["lat"][:], float)
        u, v, t = (np.asarray(f[k][0], float).mean(axis=-1) for k in "UVT")
    o = np.argsort(p)
    return p[o], lat, u[o], v[o], t[o]


def _rows(out):
    c = out.columns
    return {(c["metric"][i], c["hemisphere"][i]): (float(c["value"][i]), c["flag"][i]) for i in range(len(c["metric"]))}


def _numpy_psi500(p, lat, v, balance):
    """psi at 500 hPa by the trapezoid rule from the top level (psi = 0 there), optionally with the
    column's net flux removed (v - c, c = column integral / column depth; no level is below ground here)."""
    pa = p * 100.0
    cum = np.concatenate([np.zeros((1, lat.size)),
                          np.cumsum(0.5 * (v[1:] + v[:-1]) * np.diff(pa)[:, None], axis=0)])
    if balance:
        cum = cum - cum[-1:] * ((pa - pa[0]) / (pa[-1] - pa[0]))[:, None]
    k = int(np.flatnonzero(p == 500)[0])
    return 2 * np.pi * A * np.cos(np.deg2rad(lat)) / G * cum[k], 2 * np.pi * A * np.cos(np.deg2rad(lat)) / G * cum[-1]


def _first_zero_poleward_of_max(y, x):
    k = int(np.argmax(np.where(x <= 50, y, -np.inf)))
    for j in range(k, x.size - 1):
        if y[j] > 0 >= y[j + 1]:
            return x[j] + (x[j + 1] - x[j]) * y[j] / (y[j] - y[j + 1])
    return np.nan


@pytest.fixture(scope="module")
def cells(path):
    ids = ["hadley_edge_lat", "hadley_strength", "column_net_mass_flux", "ferrel_edge_lat", "ferrel_strength"]
    rows = {}
    for top, balance in (("zero_at_top_level", "remove_net_flux"), ("zero_at_top_level", "none"),
                         ("constant_above_top", "none")):
        cfg = config.load()
        cfg["cells"]["top"], cfg["cells"]["balance"] = top, balance
        rows[(top, balance)] = _rows(engine.track([path], cfg, metric_ids=ids))
    return rows


def test_balanced_hadley_edge_is_the_january_climatology(cells, zonal):
    p, lat, _, v, _ = zonal
    got = cells[("zero_at_top_level", "remove_net_flux")]
    nh = lat >= 0
    psi, _ = _numpy_psi500(p, lat, v, balance=True)
    edge = _first_zero_poleward_of_max(psi[nh], lat[nh])
    value, flag = got[("hadley_edge_lat", "NH")]
    assert value == pytest.approx(edge, abs=0.01)                  # numpy above, same rule
    # Peixoto & Oort (1992) fig. 7.19 (from memory): the winter (January) northern Hadley cell reaches
    # about 30 N; with the column balanced this file gives 30.9 N
    assert 28.0 <= value <= 33.0
    # the column carries a large net flux here (psi at the bottom about 69 % of the cell's strength):
    # the value is the balanced one and the flag's note says so
    assert flag == "ok;unbalanced_column"


def test_unbalanced_forms_reproduce_the_old_edge(cells, zonal):
    p, lat, _, v, _ = zonal
    nh = lat >= 0
    psi, _ = _numpy_psi500(p, lat, v, balance=False)
    edge = _first_zero_poleward_of_max(psi[nh], lat[nh])
    raw = cells[("zero_at_top_level", "none")][("hadley_edge_lat", "NH")][0]
    old = cells[("constant_above_top", "none")][("hadley_edge_lat", "NH")][0]
    assert raw == pytest.approx(edge, abs=0.01)
    # the column's net flux moves the edge about 9 degrees poleward, to where no January climatology has it
    assert old == pytest.approx(39.78, abs=0.05) and raw > 37.0


def test_net_column_flux_is_the_numpy_column_integral(cells, zonal):
    p, lat, _, v, _ = zonal
    got = cells[("zero_at_top_level", "remove_net_flux")]
    _, net = _numpy_psi500(p, lat, v, balance=False)
    for hemi, sel in (("NH", (lat >= 0) & (lat <= 70)), ("SH", (lat <= 0) & (lat >= -70))):
        value, flag = got[("column_net_mass_flux", hemi)]
        assert flag == "ok" and value == pytest.approx(np.abs(net[sel]).max(), rel=1e-6)
        strength = got[("hadley_strength", hemi)][0]
        assert value > 0.25 * strength                                  # hence the note


def test_winter_cell_is_the_stronger_and_of_the_published_size(cells):
    got = cells[("zero_at_top_level", "remove_net_flux")]
    nh, sh = got[("hadley_strength", "NH")][0], got[("hadley_strength", "SH")][0]
    # Peixoto & Oort (1992) ch. 7 (from memory): in January the northern (winter) cell is several times
    # the southern one and near 2e11 kg s-1
    assert nh > 2.5 * sh
    assert 1.2e11 <= nh <= 2.6e11
    # the Ferrel cell from the same balanced streamfunction: a closed cell poleward of the Hadley edge,
    # weaker than the Hadley cell (Peixoto & Oort 1992, ch. 7, from memory: a few 1e10 kg s-1)
    f_edge, f_flag = got[("ferrel_edge_lat", "NH")]
    assert f_flag == "ok;unbalanced_column" and 50.0 <= f_edge <= 70.0
    assert 1e10 <= got[("ferrel_strength", "NH")][0] < nh


def test_tropical_tropopause_near_100_hpa(path, zonal):
    p, lat, _, _, t = zonal
    out = _rows(engine.track([path], config.load(), metric_ids=["tropical_tropopause_pressure"]))
    value, flag = out[("tropical_tropopause_pressure", "global")]
    # numpy: at each latitude within 10 deg the layer lapse rates from the hypsometric heights; the
    # first layer above 500 hPa at or below 2 K/km must be the 100-70 hPa layer
    z = np.zeros_like(t)
    for k in range(p.size - 2, -1, -1):
        z[k] = z[k + 1] + 287.05 / G * 0.5 * (t[k] + t[k + 1]) * np.log(p[k + 1] / p[k])
    gam = (t[1:] - t[:-1]) / (z[:-1] - z[1:]) * 1000.0      # K/km of the layer between p[k] and p[k+1]
    for j in np.flatnonzero(np.abs(lat) <= 10):
        first = max(k for k in range(p.size - 1) if p[k] < 500 and gam[k, j] <= 2.0 and
                    all(gam[m, j] > 2.0 for m in range(k + 1, p.size - 1) if p[m] < 500))
        assert (p[first], p[first + 1]) == (70.0, 100.0)
    # the kernel places it between the mid-levels of the 150-100 and 100-70 hPa layers
    assert flag == "ok" and np.sqrt(100.0 * 70.0) <= value <= np.sqrt(150.0 * 100.0)
    # Seidel et al. (2001) JGR 106, 7857 (from memory): the tropical cold-point and lapse-rate
    # tropopauses lie near 100 hPa (16-17 km)
    assert value == pytest.approx(100.0, abs=10.0)


def test_levels_cut_below_the_2km_layer_give_nan_with_the_reason(tmp_path, path):
    # the same file without the levels above 200 hPa: midlatitude tropopauses (about 250 hPa in
    # January; common practice) have a candidate but no 2 km of data above it
    cut = tmp_path / "cut.nc"
    import xarray as xr
    with xr.open_dataset(path, decode_times=False) as ds:
        ds.sel(lev=ds.lev >= 200).to_netcdf(cut)
    out = _rows(engine.track([str(cut)], config.load(), metric_ids=["tropopause_break_lat"]))
    assert {out[("tropopause_break_lat", h)][1] for h in ("NH", "SH")} == {"data_end_within_2km"}
    assert all(np.isnan(out[("tropopause_break_lat", h)][0]) for h in ("NH", "SH"))


def test_eddy_flux_at_a_missing_level_is_interpolated_with_a_note(tmp_path, path):
    import xarray as xr
    ids = ["eddy_momentum_flux_lat", "eddy_momentum_flux_max"]
    full = _rows(engine.track([path], config.load(), metric_ids=ids))
    assert full[("eddy_momentum_flux_lat", "NH")][1] == "time_step_unknown"      # 250 hPa is in the file
    cut = tmp_path / "no250.nc"
    with xr.open_dataset(path, decode_times=False) as ds:
        ds.sel(lev=ds.lev != 250).to_netcdf(cut)
    got = _rows(engine.track([str(cut)], config.load(), metric_ids=ids))
    value, flag = got[("eddy_momentum_flux_max", "NH")]
    assert flag == "time_step_unknown;interpolated_level"
    # numpy: u and v interpolated linearly in log p between 200 and 300 hPa, then [u'v'] per latitude
    with netCDF4.Dataset(path) as f:
        lev = list(np.asarray(f["lev"][:], float))
        lat = np.asarray(f["lat"][:], float)
        w = (np.log(250.0) - np.log(300.0)) / (np.log(200.0) - np.log(300.0))
        uv = {k: (1 - w) * np.asarray(f[k][0, lev.index(300.0)], float) + w * np.asarray(f[k][0, lev.index(200.0)], float)
              for k in "UV"}
    cov = (uv["U"] * uv["V"]).mean(axis=-1) - uv["U"].mean(axis=-1) * uv["V"].mean(axis=-1)
    sel = (lat >= 15) & (lat <= 60)
    assert value == pytest.approx(cov[sel].max(), rel=0.02)          # grid maximum vs parabola vertex


ECHAM = "/usr/share/ncarg/data/nug/rectilinear_grid_3D.nc"      # Debian libncarg-data, ECHAM5 model output


@pytest.mark.skipif(not os.path.exists(ECHAM), reason="rectilinear_grid_3D.nc (Debian libncarg-data) not installed")
def test_model_temperature_tropopause_as_it_ships():
    # ECHAM5 temperature (one January time step, 17 levels 1000-10 hPa in Pa, T42 grid), read as it ships.
    out = _rows(engine.track([ECHAM], config.load(), metric_ids=["tropical_tropopause_pressure", "tropopause_break_lat"]))
    value, flag = out[("tropical_tropopause_pressure", "global")]
    # Seidel et al. (2001) JGR 106, 7857 (from memory): the tropical lapse-rate tropopause near 100 hPa
    assert flag == "ok" and value == pytest.approx(100.0, abs=10.0)
    # Seidel & Randel (2007) JGR 112, D20113 (from memory): the tropopause height drops steeply around
    # 30-40 degrees in each hemisphere (the subtropical break)
    for hemi, s in (("NH", 1), ("SH", -1)):
        lat, f = out[("tropopause_break_lat", hemi)]
        assert f == "ok" and 25.0 <= s * lat <= 45.0
