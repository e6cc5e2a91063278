"""Detect features: reduced fields of one batch -> every family's results per sector, as columns.

In: one reduced batch (gather.py), its low-pass filtered means (lowpass.py) and the run's plan.
Out: appended to :attr:`Detector.cols`, per metric and hemisphere, the time index, the index of
the extra key (e.g. ensemble member along a dimension), hemisphere, sector, metric, value and
flag. The families see a :class:`~circtrack.metrics.common.Fields` per sector: N samples = time
steps x extra keys, the zonal mean and the share of valid longitudes of every role, the
reducers' extras, the record's time step and the filtered means.

With variants (``--vary``), every family runs once per variant on the same fields, with that
variant's config, and the column ``v`` holds the variant's index (0 in a plain run).
"""

from __future__ import annotations

import numpy as np

from circtrack.engine import profile
from circtrack.metrics.common import Fields
from circtrack.registry import hemispheres

COLUMNS = ("t", "e", "v", "hemisphere", "sector", "metric", "value", "flag")


class Detector:
    """Runs the plan's families on batch after batch and collects their results as columns."""

    def __init__(self, rp):
        self.rp, self.cfg = rp, rp.cfg
        info0 = rp.infos[0]
        self.extra = info0.detected.extra_dims
        self.extra_names = list(self.extra)
        self.n_extra = int(np.prod([len(v) for v in self.extra.values()])) if self.extra else 1
        self.sector_names = ["zonal"] + [s[0] for s in rp.sectors]
        self.lat = np.sort(info0.detected.lat)
        self.plev = {r: info0.plev[r] for r in rp.plan.roles}
        # near-surface roles read from a pressure level (inputs/readers.py lowest_level_substitute)
        self.from_level = {r: rd.from_level_hpa for r, rd in info0.readers.items()
                           if getattr(rd, "from_level_hpa", None) is not None}
        self.wanted = set(rp.plan.metric_ids)
        self.cols = {k: [] for k in COLUMNS}
        self.cfgs = [v.cfg for v in rp.variants] or [rp.cfg]

    def fields(self, reduced, lowpassed, s, bt):
        """The :class:`Fields` of sector ``s`` for a batch of ``bt`` time steps."""
        n_lead = 1 + len(self.extra_names)

        def per_sample(a):
            return a.reshape((bt * self.n_extra,) + a.shape[n_lead:])

        mean = {r: per_sample(a[..., s, 0]) for r, a in reduced["stats"].items()}
        cov = {r: per_sample(a[..., s, 1]) for r, a in reduced["stats"].items()}
        ext = {n: per_sample(a[..., s]) for n, a in reduced["extras"].items()}
        low = {r: per_sample(a[..., s]) for r, a in lowpassed.items()}
        return Fields(lat=self.lat, plev=self.plev, mean=mean, coverage=cov, sector=self.sector_names[s],
                      extras=ext, info={"time_step_days": self.rp.step_days, "lowpass": low,
                            "from_level_hpa": self.from_level})

    def batch(self, reduced, lowpassed, t0, t1):
        """Every family on every sector of the batch of time steps ``t0:t1``."""
        bt = t1 - t0
        tidx = np.repeat(np.arange(t0, t1), self.n_extra)
        eidx = np.tile(np.arange(self.n_extra), bt)
        for s, sname in enumerate(self.sector_names):
            fields = self.fields(reduced, lowpassed, s, bt)
            for fam in self.rp.plan.families:
                if sname != "zonal" and not fam.sectors:
                    continue
                for v, results in enumerate(self._per_variant(fam, fields)):
                    for m in fam.metrics:
                        if m.id in self.wanted:
                            self._append(tidx, eidx, v, sname, m, results[m.id])

    def _per_variant(self, fam, fields):
        """The family's results for each variant. A plain run calls it once with the run's config.
        With variants, each call notes the settings the family looked up; a variant whose values of
        all those settings equal an earlier variant's gets that variant's results (the family is a
        function of the fields and the settings it reads), so a family no varied key touches runs once."""
        if len(self.cfgs) == 1:
            with profile.timed("families (parent)", fam.name):
                return [fam.compute(fields, self.cfgs[0])]
        done, out = [], []
        for cfg in self.cfgs:
            same = next((res for seen, first, res in done
                         if all(_setting(cfg, k) == _setting(first, k) for k in seen)), None)
            if same is None:
                seen = set()
                with profile.timed("families (parent)", fam.name):
                    same = fam.compute(fields, _Reads(cfg, seen))
                done.append((seen, cfg, same))
            out.append(same)
        return out

    def _append(self, tidx, eidx, v, sname, m, res):
        cols = self.cols
        for h, hemi in enumerate(hemispheres(m)):
            cols["t"].append(tidx)
            cols["e"].append(eidx)
            cols["v"].append(np.full(tidx.size, v, dtype=np.int32))
            cols["hemisphere"].append(np.full(tidx.size, hemi, dtype=object))
            cols["sector"].append(np.full(tidx.size, sname, dtype=object))
            cols["metric"].append(np.full(tidx.size, m.id, dtype=object))
            cols["value"].append(res.value[:, h])
            cols["flag"].append(res.flag[:, h].astype(object))


class _Reads(dict):
    """A config that notes in ``seen`` every setting looked up (``section.key``; ``section.*`` when a
    whole table is walked)."""

    def __init__(self, d, seen, prefix=""):
        super().__init__(d)
        self._seen, self._prefix = seen, prefix

    def __getitem__(self, key):
        val = super().__getitem__(key)
        if isinstance(val, dict):
            return _Reads(val, self._seen, f"{self._prefix}{key}.")
        self._seen.add(f"{self._prefix}{key}")
        return val

    def get(self, key, default=None):
        return self[key] if key in self else default

    def _whole(self):
        self._seen.add(f"{self._prefix}*")

    def items(self):
        self._whole()
        return super().items()

    def values(self):
        self._whole()
        return super().values()

    def keys(self):
        self._whole()
        return super().keys()

    def __iter__(self):
        self._whole()
        return super().__iter__()


def _setting(cfg, name):
    """The value of ``section.key`` (``*``: the whole table) in a plain config."""
    node = cfg
    for part in name.split("."):
        if part == "*":
            return node
        node = node.get(part) if isinstance(node, dict) else None
    return node
