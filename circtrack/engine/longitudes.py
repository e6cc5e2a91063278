"""Per-longitude jet cores: a side table beside the run's rows (``track --cores-by-longitude FILE``).

In: the reducer extra ``jet_cores_by_longitude`` of each reduced batch (computed in the read tasks by
:func:`circtrack.metrics.cores.by_longitude_reducer`: a few numbers per longitude, never the fields).
Out: an :class:`~circtrack.engine.rows.Outcome` with the key columns ``source, time, [extra keys],
hemisphere, lon, metric`` (``lon``: degrees east 0..360 of the longitude or band centre) and the
metrics ``{subtropical,eddy}_jet_core_{lat,pressure,speed}``, flags as in the main rows. Memory grows
with the record (rows per time step x longitudes), as the file does.
"""

from __future__ import annotations

import numpy as np

from circtrack.engine.rows import Outcome, derive_source
from circtrack.engine.times import iso_time
from circtrack.metrics import catalogue
from circtrack.metrics import cores as C


def add_to_plan(plan):
    """The run also reduces the cores per longitude: the table's reducer and ``ua`` on every level."""
    plan.reducers[C.TABLE_NAME] = C.by_longitude_reducer
    plan.roles["ua"] = None


class LongitudeTable:
    """Collects the per-longitude cores batch by batch (beside features.Detector)."""

    def __init__(self, rp):
        self.rp = rp
        info0 = rp.infos[0]
        self.extra = info0.detected.extra_dims
        self.n_extra = int(np.prod([len(v) for v in self.extra.values()])) if self.extra else 1
        self.lon = C.band_centres(np.asarray(info0.detected.lon, float), rp.cfg)
        self.cols = {k: [] for k in ("t", "e", "hemisphere", "lon", "metric", "value", "flag")}

    def batch(self, reduced, t0, t1):
        arr = reduced["extras"][C.TABLE_NAME][..., 0]                    # (bt, *extra, 2, 2, 4, B)
        bt, nb = t1 - t0, arr.shape[-1]
        arr = arr.reshape((bt * self.n_extra,) + arr.shape[-4:])
        n = arr.shape[0]
        tidx = np.repeat(np.arange(t0, t1), self.n_extra)[:, None, None]
        eidx = np.tile(np.arange(self.n_extra), bt)[:, None, None]
        hemi = np.array(["NH", "SH"], dtype=object)[None, :, None]
        lon = self.lon[None, None, :]
        shape = (n, 2, nb)
        for metric, (value, flag) in C.table_rows(arr).items():
            c = self.cols
            c["t"].append(np.broadcast_to(tidx, shape).ravel())
            c["e"].append(np.broadcast_to(eidx, shape).ravel())
            c["hemisphere"].append(np.broadcast_to(hemi, shape).ravel())
            c["lon"].append(np.broadcast_to(lon, shape).ravel())
            c["metric"].append(np.full(n * 2 * nb, metric, dtype=object))
            c["value"].append(value.ravel())
            c["flag"].append(flag.ravel())

    def outcome(self, step_notes, label):
        rp = self.rp
        flat = {k: (np.concatenate(v) if v else np.array([], dtype=object)) for k, v in self.cols.items()}
        iso = np.array([iso_time(t) for t in rp.times], dtype=object)
        source = label or derive_source([i.path for i in rp.infos], rp.infos[0].detected.attrs)
        t = flat["t"].astype(int)
        out = {"source": np.full(t.size, source, dtype=object), "time": iso[t]}
        names = list(self.extra)
        if names:
            grids = np.meshgrid(*[np.arange(len(v)) for v in self.extra.values()], indexing="ij")
            for name, g, vals in zip(names, grids, self.extra.values()):
                out[name] = np.array([str(x) for x in np.asarray(vals)[g.ravel()]], dtype=object)[flat["e"].astype(int)]
        cat = catalogue()
        out["hemisphere"] = flat["hemisphere"]
        out["lon"] = np.array([np.format_float_positional(round(x, 6), trim="-") for x in flat["lon"].astype(float)],
                              dtype=object)                          # 357.1875, not 357.188
        out["metric"] = flat["metric"]
        out["value"] = flat["value"].astype(float)
        out["units"] = np.array([cat[m].units for m in flat["metric"]], dtype=object)
        notes = step_notes[t] if t.size else np.array([], dtype=object)
        out["flag"] = np.where(notes != "", flat["flag"].astype(str).astype(object) + ";" + notes, flat["flag"])
        prov = {"table": "jet cores per longitude", "longitude_band_deg": rp.cfg["cores"]["longitude_band_deg"],
                "time_span": [iso[0], iso[-1]] if iso.size else None, "extra_key_columns": names,
                "inputs": [i.path for i in rp.infos]}
        # lon sorts as a number: its rank among the band centres
        return Outcome(out, ["source", "time", *names, "hemisphere", "lon", "metric"], prov, t)
