"""Quality flags written in the CSV ``flag`` column. A value that is not ``ok`` is doubtful or NaN.

A flag may carry notes after ';' (``ok;interpolated_level``): the value is computed as defined
and the note says something the user should know about it (NOTES below).
"""

import numpy as np

FLAGS = {
    "ok": "value computed as defined",
    "no_sign_change_in_window": "no sign change between the start point and the end of the search window (values "
                                "that fall to exactly zero and stay there or turn back only touch zero); value is NaN "
                                "(named no_zero_crossing in earlier builds)",
    "crossing_in_data_gap": "the search for a sign change met missing points before finding one, so the zero may lie "
                            "in the gap; value is NaN",
    "crossing_at_pole_row": "the sign change lies in the last segment before a pole row (90 deg), or the values fall "
                            "to zero and stay zero up to the pole row, where a zonal mean of a wind component is not "
                            "defined; value is NaN",
    "extremum_at_window_edge": "the extremum sits on the edge of its search window, so the true one may lie outside; value is NaN",
    "extremum_at_pole_row": "the extremum sits on a pole row (90 deg); value is NaN",
    "extremum_next_to_missing_data": "a neighbour of the extremum is missing, so the true extremum may lie in the gap; value is NaN",
    "weak_cell": "the overturning cell is weaker than cells.weak_cell_kg_s (Hadley) or cells.ferrel_weak_cell_kg_s "
                 "(Ferrel); its edge is NaN, its strength is kept",
    "too_little_data": "too few valid points in the search window (see run.min_window_fraction); value is NaN",
    "level_missing": "a pressure level the metric needs lies outside the data's levels; value is NaN",
    "no_half_max": "the wind does not fall to half its maximum on one side of the jet; width is NaN",
    "data_end_within_2km": "a lapse-rate tropopause candidate was found but the data's levels end less than "
                           "tropopause.depth_m above it, so the WMO 2-km condition cannot be checked; value is NaN",
    "lowpass_window_incomplete": "the low-pass filter window reaches past the record's ends or across a gap in time; value is NaN",
    "weak_peak": "the poleward eddy momentum flux or energy transport peaks below its threshold (eddies.min_momentum_flux_m2_s2, energy.min_transport_pw): the latitude is NaN, the peak value is kept",
    "time_mean_input": "the input's time step exceeds eddies.max_time_step_days (e.g. monthly means): the eddy and energy fluxes contain only the time-mean flow (mean circulation and stationary eddies), the transient eddies are missing; value kept",
    "time_step_unknown": "a single time step, so it is unknown whether transient eddies are resolved; eddy and energy flux value kept",
    "surface_level_below_ground": "a near-surface wind taken from a pressure level (no uas in the file) is missing "
                                  "at more than half the latitudes of the search window, mostly because the level "
                                  "lies below the ground there (surface pressure ps below the level); value is NaN",
    "cells_out_of_order": "the southern cell's minimum lies north of the northern cell's maximum; boundary is NaN",
    "column_too_short": "the pressure window holds fewer than 3 levels, or the column at the wind maximum fewer than 3 valid levels or the same wind just above or below it, so a jet core cannot be located in the vertical; value is NaN",
    "weak_wave": "a planetary wave's amplitude is below waves.min_amplitude_m_s (0.05 m s-1): noise (e.g. float "
                 "rounding of a zonally uniform field), not a wave; value kept, and trend, season and plot leave it out",
    "weak_jet_core": "the wind maximum in a jet-core window is weaker than cores.min_core_speed_m_s: no jet; value is NaN",
    "merged_jets": "the subtropical and eddy-driven windows give the same core (one merged jet): reported once, as the subtropical core ('ok;merged_jets'), the eddy-driven core is NaN",
}

# notes appended after ';' to a flag whose value is kept
NOTES = {
    "merged_jets": "the subtropical and eddy-driven jet-core windows give the same core (one merged jet), "
                   "reported as the subtropical core; the eddy-driven core is NaN with flag merged_jets",
    "provisional_data": "the time step comes from a provisional data stream (expver other than 1) because the final "
                        "one has no data there",
    "unbalanced_column": "the column's net mass flux across a latitude circle (between the equator and "
                         "cells.edge_search_limit) exceeds cells.max_imbalance_fraction of the Hadley cell's strength; "
                         "with cells.balance = \"remove_net_flux\" it was removed, otherwise it is in the value; the "
                         "metric column_net_mass_flux gives its size",
    "interpolated_level": "a pressure level the metric needs is not in the data and was interpolated linearly in "
                          "log-pressure between the two levels around it",
    "wind_from_PhPa": "the file has no near-surface wind: ua (va) on the pressure level P hPa, its lowest, stands in "
                      "for uas (vas); columns where that level is below ground (from ps, when the file has it) are "
                      "left out",
    "humidity_filled_aloft": "specific humidity is missing above the ground at some levels (e.g. above 300 hPa) and was "
                             "counted as 0 there",
}

# the old name of a flag, for readers of older outputs (CHANGELOG lists them)
RENAMED = {"no_zero_crossing": "no_sign_change_in_window"}


def note_meaning(note):
    """What a note means; notes that carry a number (wind_from_1000hPa) share one entry (wind_from_PhPa)."""
    import re
    return NOTES.get(note) or NOTES.get(re.sub(r"_\d+(\.\d+)?hPa$", "_PhPa", note), "")


def usable(flags):
    """Rows whose value is computed as defined: flag ``ok``, possibly followed by notes after ';'
    (e.g. ``ok;provisional_data``). Works on a string or on a pandas Series of strings."""
    if isinstance(flags, str):
        return flags.split(";", 1)[0] == "ok"
    return flags.astype(str).str.split(";", n=1).str[0] == "ok"


def note_summary(times, hemispheres, metrics, flags, values=None, max_listed=1000):
    """For the sidecar: each note found after ';' in ``flags`` with the rows it was attached to,
    ``{note: {"meaning", "rows", "metrics", "first_time", "last_time", "time_step_count",
    "time_steps"}}`` (sorted); ``time_steps`` lists the time steps when there are at most
    ``max_listed``. With ``values``, ``unbalanced_column`` also lists the size of the imbalance per
    time step and hemisphere (``column_net_mass_flux`` in kg s-1 and its share of ``hadley_strength``)."""
    flags = np.asarray(flags, dtype=object)
    noted = np.flatnonzero([";" in str(f) for f in flags]) if flags.size else np.array([], int)
    times, hemispheres, metrics = (np.asarray(a, dtype=object) for a in (times, hemispheres, metrics))
    out = {}
    for t, h, m, f in zip(times[noted], hemispheres[noted], metrics[noted], flags[noted]):
        for note in str(f).split(";")[1:]:
            if not note:
                continue
            e = out.setdefault(note, {"metrics": set(), "time_steps": set(), "rows": 0, "where": set()})
            e["metrics"].add(f"{m} {h}")
            e["time_steps"].add(str(t))
            e["where"].add((str(t), str(h)))
            e["rows"] += 1
    summary = {}
    for k, v in sorted(out.items()):
        steps = sorted(v["time_steps"])
        summary[k] = {"meaning": note_meaning(k), "rows": v["rows"], "metrics": sorted(v["metrics"]),
                      "first_time": steps[0], "last_time": steps[-1], "time_step_count": len(steps)}
        if len(steps) <= max_listed:
            summary[k]["time_steps"] = steps
    if values is not None and "unbalanced_column" in out:
        where = out["unbalanced_column"]["where"]
        got = {}
        values = np.asarray(values, dtype=float)
        sel = np.flatnonzero(np.isin(metrics.astype(str), ["column_net_mass_flux", "hadley_strength"]))
        for t, h, m, val in zip(times[sel], hemispheres[sel], metrics[sel], values[sel]):
            if (str(t), str(h)) in where:
                got.setdefault((str(t), str(h)), {})[m] = float(val)
        sizes = []
        for (t, h), d in sorted(got.items())[:max_listed]:
            net, strength = d.get("column_net_mass_flux"), d.get("hadley_strength")
            share = net / strength if net is not None and strength not in (None, 0.0) else None
            net = None if net is None or net != net else net
            sizes.append({"time": t, "hemisphere": h, "column_net_mass_flux_kg_s": net,
                          "share_of_hadley_strength": None if share is None or share != share else round(share, 4)})
        summary["unbalanced_column"]["imbalance"] = sizes
    return summary


def note_summary_from_csv(text):
    """:func:`note_summary` of a written tidy CSV (header ``...,time,...,hemisphere,...,metric,value,
    units,flag``), e.g. for a sidecar written after an incremental update."""
    lines = text.splitlines()
    if not lines:
        return {}
    head = lines[0].split(",")
    it, ih, im, iv, iflag = (head.index(c) for c in ("time", "hemisphere", "metric", "value", "flag"))
    rows = [ln.split(",") for ln in lines[1:] if ln]
    return note_summary([r[it] for r in rows], [r[ih] for r in rows], [r[im] for r in rows],
                        [r[iflag] for r in rows], [float(r[iv]) for r in rows])
