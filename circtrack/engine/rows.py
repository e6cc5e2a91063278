"""Rows: the families' columns -> the tidy table of one run (:class:`Outcome`) with its provenance.

In: the columns a :class:`~circtrack.engine.features.Detector` collected, the per time step notes
and the :class:`~circtrack.engine.plan.RunPlan`. Out: an :class:`Outcome`: unsorted columns
``source, time, [extra keys], hemisphere, sector, metric, value, units, flag``, the key columns,
the provenance for the sidecar and the chronological rank of each row (output.py sorts, formats
and writes). Per-member outcomes are merged here too (:func:`merge_members`).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np

from circtrack import variants as V
from circtrack.engine.locate import file_stat
from circtrack.engine.plan import MEMBER_ATTRIBUTES
from circtrack.engine.times import iso_time
from circtrack.errors import InputError
from circtrack.flags import note_summary
from circtrack.metrics import catalogue


@dataclass
class Outcome:
    columns: dict                 # column name -> numpy array (unsorted)
    key_columns: list
    provenance: dict
    time_order: np.ndarray        # chronological rank per row (for sorting)
    tables: dict = field(default_factory=dict)   # side tables, e.g. "cores_by_longitude" (engine/longitudes.py)


def derive_source(paths, attrs):
    """The ``source`` column without ``--label``: the global attributes ``source_id``,
    ``experiment_id``, ``variant_label`` of the first file, else the common start of the file
    names, else the parent directory. Checked like every CSV text field (guards.check_label):
    InputError naming the file or attribute it came from."""
    from circtrack.guards import check_label

    fix = "give --label NAME (letters, digits, '_' or '-')"
    if attrs.get("source_id"):
        keys = [k for k in ("source_id", "experiment_id", "variant_label") if attrs.get(k)]
        for k in keys:
            check_label(str(attrs[k]), f"{paths[0]}: the global attribute {k} = {str(attrs[k])!r} (used for the "
                        "source column)", fix, error=InputError)
        return "_".join(str(attrs[k]) for k in keys)
    stems = [os.path.basename(p.rstrip("/")).split(".")[0] for p in paths]
    prefix = os.path.commonprefix(stems) if len(stems) > 1 else stems[0]
    prefix = prefix.rstrip("0123456789_-. ") if len(stems) > 1 else prefix
    if len(prefix) >= 3:
        return check_label(prefix, f"{paths[0]}: the source {prefix!r} taken from the file name", fix,
                           error=InputError)
    parent = os.path.dirname(os.path.abspath(paths[0]))
    name = os.path.basename(parent) or "data"
    return check_label(name, f"{paths[0]}: the source {name!r} taken from the directory name {parent}", fix,
                       error=InputError)


def outcome(rp, cols, step_notes, label):
    """The tidy :class:`Outcome` of one run from the columns the families filled."""
    infos, nt = rp.infos, rp.times.size
    cat = catalogue()
    extra = infos[0].detected.extra_dims
    extra_names = list(extra)
    flat = {k: (np.concatenate(v) if v else np.array([], dtype=object)) for k, v in cols.items()}
    iso = np.array([iso_time(t) for t in rp.times], dtype=object)
    source = label or derive_source([i.path for i in infos], infos[0].detected.attrs)
    out = {"source": np.full(flat["t"].size, source, dtype=object), "time": iso[flat["t"]] if nt else flat["t"]}
    if extra_names:
        grids = np.meshgrid(*[np.arange(len(v)) for v in extra.values()], indexing="ij")
        for name, g, vals in zip(extra_names, grids, extra.values()):
            out[name] = np.array([str(x) for x in np.asarray(vals)[g.ravel()]], dtype=object)[flat["e"]]
    out["hemisphere"] = flat["hemisphere"]
    out["sector"] = flat["sector"]
    variant_key = []
    if rp.variants:
        names = np.array([v.name for v in rp.variants], dtype=object)
        out["variant"] = names[flat["v"].astype(int)] if flat["v"].size else flat["v"].astype(object)
        variant_key = ["variant"]
    out["metric"] = flat["metric"]
    out["value"] = flat["value"].astype(float)
    out["units"] = np.array([cat[m].units for m in flat["metric"]], dtype=object)
    out["flag"] = flat["flag"]
    notes = step_notes
    if nt and flat["t"].size and (notes != "").any():
        row_notes = notes[flat["t"]]
        out["flag"] = np.where(row_notes != "", flat["flag"].astype(str).astype(object) + ";" + row_notes,
                               flat["flag"])
    prov = provenance(rp, iso, notes, extra_names)
    # notes the metrics added to their flags (e.g. unbalanced_column, with its size): where they occur
    prov["flag_notes"] = note_summary(out["time"], out["hemisphere"], out["metric"], out["flag"], out["value"])
    return Outcome(out, ["source", "time", *extra_names, "hemisphere", "sector", *variant_key, "metric"], prov,
                   flat["t"])


def provenance(rp, iso, notes, extra_names):
    """The run's part of the sidecar: inputs and how they were read, repeats, notes, parameters."""
    infos, nt = rp.infos, rp.times.size
    prov = {
        "inputs": [{**file_stat(i.path, rp.cfg), "variables": i.detected.variables, "units": i.detected.units,
                    "found_by": i.detected.why, "time_steps": int(i.detected.times.size),
                    "first_time": iso_time(i.detected.times[0]) if i.detected.times.size else None,
                    "last_time": iso_time(i.detected.times[-1]) if i.detected.times.size else None,
                    "pressure_levels_hpa": {r: (None if v is None else [float(x) for x in v])
                                            for r, v in i.plev.items()},
                    "pressure_units_in_file": i.detected.plev_units, "layout": i.detected.layout}
                   for i in infos],
        "skipped_inputs": rp.skipped,
        "repeated_time_steps_dropped": [{"time": iso_time(rp.times_all[k]), "path": infos[rp.file_of[k]].path,
                                         "kept_from": infos[rp.file_of[p]].path,
                                         **({"provisional_replaced_by_final": True}
                                            if rp.provisional[k] and not rp.provisional[p] else {})}
                                        for k, p in zip(rp.dropped, rp.partner)],
        "repeated_times_policy": rp.repeat_policy,
        "calendar": infos[0].detected.calendar,
        "time_span": [iso[0], iso[-1]] if nt else None,
        "time_steps": int(nt),
        "metrics": rp.plan.metric_ids,
        "sectors": {n: [a, b] for n, a, b in rp.sectors},
        "extra_key_columns": extra_names,
        "time_step_notes": {code: [iso[k] for k in range(nt) if code in str(notes[k]).split(";")]
                            for code in sorted({c for n in notes for c in str(n).split(";") if c})},
    }
    if rp.lowpass:
        prov["lowpass"] = rp.lowpass.describe()
    if rp.variants:
        prov["variants"] = [{"variant": v.name, "settings": v.settings} for v in rp.variants]
        prov["variant_equal_to_parameters"] = V.base_name(rp.cfg)
    return prov


def merge_members(labels, outs, skipped=()):
    """One Outcome from per-member Outcomes, with a ``member`` key column after ``time``."""
    first = outs[0]
    names = list(first.columns)
    at = names.index("time") + 1
    names = names[:at] + ["member"] + names[at:]
    cols = {}
    for name in names:
        parts = []
        for m, o in zip(labels, outs):
            n = len(o.columns["metric"])
            if name == "member":
                parts.append(np.full(n, m, dtype=object))
            elif name in o.columns:
                parts.append(np.asarray(o.columns[name], dtype=object if name != "value" else float))
            else:
                raise InputError(f"member {m}: its rows have other key columns than member {labels[0]}'s "
                                 f"({', '.join(o.key_columns)}); run the members separately")
        cols[name] = np.concatenate(parts)
    k = first.key_columns.index("time") + 1
    keys = first.key_columns[:k] + ["member"] + first.key_columns[k:]
    # ISO 8601 dates of one calendar sort as text (years 0000-9999)
    _, rank = np.unique(np.asarray(cols["time"], dtype=str), return_inverse=True)
    prov = dict(first.provenance)
    prov["inputs"] = [i for o in outs for i in o.provenance["inputs"]]
    prov["skipped_inputs"] = list(skipped)
    prov["members"] = {m: {"found_by": "global attribute " + "/".join(MEMBER_ATTRIBUTES),
                           "time_span": o.provenance["time_span"], "time_steps": o.provenance["time_steps"],
                           "inputs": [i["path"] for i in o.provenance["inputs"]]} for m, o in zip(labels, outs)}
    prov["extra_key_columns"] = ["member"] + list(first.provenance.get("extra_key_columns", []))
    prov["flag_notes"] = note_summary(cols["time"], cols["hemisphere"], cols["metric"], cols["flag"], cols["value"])
    return Outcome(cols, keys, prov, rank)

