"""Longitude sectors: bands crossing 0 deg or the dateline, in either longitude convention."""

from __future__ import annotations

import numpy as np
import pytest

from circtrack import config, engine, synthetic
from circtrack.engine import sector_mask
from tests.conftest import LAT, PLEV, times

LON360 = np.arange(0.0, 360.0, 10.0)


@pytest.mark.parametrize("lon0, lon1, inside", [
    (-30.0, 30.0, {330, 340, 350, 0, 10, 20, 30}),              # crosses 0 deg
    (330.0, 30.0, {330, 340, 350, 0, 10, 20, 30}),              # the same band written in 0..360
    (150.0, -150.0, {150, 160, 170, 180, 190, 200, 210}),       # crosses the dateline
    (150.0, 210.0, {150, 160, 170, 180, 190, 200, 210}),
])
def test_sector_masks_in_both_longitude_conventions(lon0, lon1, inside):
    got360 = set(LON360[sector_mask(LON360, lon0, lon1)].astype(int))
    lon180 = np.where(LON360 > 180, LON360 - 360, LON360)
    got180 = set((lon180[sector_mask(lon180, lon0, lon1)] % 360).astype(int))
    assert got360 == inside and got180 == inside


def _jet_that_moves_with_longitude(tmp_path, lon):
    """Eddy-driven jet at 40 N within 60 deg of Greenwich and at 50 N elsewhere (closed form per column)."""
    ds = synthetic.dataset(LAT, lon, PLEV, times(1), wave_amplitude=0.0)
    near0 = np.abs(((lon + 180.0) % 360.0) - 180.0) <= 60.0
    lat = LAT[:, None]
    u850 = np.where(near0[None, :], 20 * np.exp(-((lat - 40) / 8) ** 2), 20 * np.exp(-((lat - 50) / 8) ** 2))
    k = list(PLEV).index(850.0)
    ds["ua"][0, k] = u850
    path = tmp_path / "moving.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding("noleap"))
    return str(path)


@pytest.mark.parametrize("convention", ["0..360", "-180..180"])
def test_sector_jets_across_zero_and_the_dateline(tmp_path, convention):
    lon = np.arange(0.0, 360.0, 5.0)
    if convention == "-180..180":
        lon = np.where(lon >= 180, lon - 360, lon)
    path = _jet_that_moves_with_longitude(tmp_path, lon)
    cfg = config.load()
    cfg["sectors"] = {"greenwich": [-40.0, 40.0]}                        # a named sector from a config
    out = engine.track([path], cfg, metric_ids=["eddy_jet_lat"], sectors=[("dateline", 150.0, -150.0)])
    c = out.columns
    got = {s: v for s, h, v in zip(c["sector"], c["hemisphere"], c["value"]) if h == "NH"}
    assert got["greenwich"] == pytest.approx(40.0, abs=0.1)
    assert got["dateline"] == pytest.approx(50.0, abs=0.1)
    assert 40.0 < got["zonal"] < 50.0
    assert out.provenance["sectors"] == {"dateline": [150.0, -150.0], "greenwich": [-40.0, 40.0]}
