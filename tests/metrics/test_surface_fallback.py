"""Near-surface wind from the lowest pressure level when a file has no uas."""

from __future__ import annotations

import numpy as np
import pytest

from circtrack import config, engine, synthetic
from tests.conftest import csv_rows, make_dataset, write

WIND = ["surface_wind_zero_lat", "polar_easterly_edge_lat", "trade_wind_speed", "surface_westerly_speed"]


def _with_surface_wind(ds):
    """Trades (easterlies) equatorward of 30 deg, westerlies to 60 deg, polar easterlies beyond."""
    lat = ds["lat"].values
    u = -8.0 * np.sin(np.deg2rad(6 * np.abs(lat))) * np.cos(np.deg2rad(lat))
    ds = ds.copy(deep=True)
    ds["ua"][:, 0, :, :] = u[None, :, None]                     # plev[0] = 1000 hPa: the lowest level
    return ds, u


def test_lowest_level_stands_in_for_uas(tmp_path):
    ds, u = _with_surface_wind(make_dataset(2))
    levels_only = write(ds, tmp_path / "levels.nc")
    with_uas = ds.copy()
    with_uas["uas"] = (("time", "lat", "lon"), ds["ua"].values[:, 0], {"standard_name": "eastward_wind",
                                                                          "units": "m s-1"})
    with_uas = write(with_uas, tmp_path / "uas.nc")
    cfg = config.load()
    a = engine.track([levels_only], cfg, metric_ids=WIND, label="L")
    b = engine.track([with_uas], cfg, metric_ids=WIND, label="L")
    # the same values and flags; the rows from the lowest level also say so (issue 13: ';wind_from_1000hPa')
    assert [r.replace(";wind_from_1000hPa", "") for r in csv_rows(a)] == csv_rows(b)
    assert all(r.endswith(";wind_from_1000hPa") for r in csv_rows(a) if ",NaN," not in r)
    assert not any("wind_from" in r for r in csv_rows(b))
    # the closed form: u = 0 where sin(6 |lat|) = 0, i.e. at 30 deg (trades to westerlies) and
    # 60 deg (westerlies to polar easterlies), in both hemispheres
    c = a.columns
    for metric, want in (("surface_wind_zero_lat", 30.0), ("polar_easterly_edge_lat", 60.0)):
        for hemi, sign in (("NH", 1), ("SH", -1)):
            got = c["value"][(c["metric"] == metric) & (c["hemisphere"] == hemi)]
            assert np.allclose(got, sign * want, atol=0.05), (metric, hemi, got)
    why = a.provenance["inputs"][0]["found_by"]["uas"]
    assert "lowest pressure level of ua" in why and "1000 hPa" in why
    assert "lowest" not in b.provenance["inputs"][0]["found_by"]["uas"]      # a real uas is used as it is


def test_surface_belts_from_levels_only_when_asked_for(tmp_path):
    """The lowest level may lie below ground over much of the globe, so without uas the surface belts
    are computed only when asked for with --metrics, never in the default set."""
    ds, _ = _with_surface_wind(make_dataset(1))
    path = write(ds, tmp_path / "levels.nc")
    out = engine.track([path], config.load(), label="L")
    assert not set(WIND) & set(out.columns["metric"])
