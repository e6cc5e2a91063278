"""Quality flags written in the CSV ``flag`` column. A value that is not ``ok`` is doubtful or NaN."""

FLAGS = {
    "ok": "value computed as defined",
    "no_zero_crossing": "no sign change inside the search window; value is NaN",
    "extremum_at_window_edge": "the extremum sits on the edge of its search window, so the true one may lie outside; value is NaN",
    "weak_cell": "the overturning cell is weaker than cells.weak_cell_kg_s; its edge is NaN, its strength is kept",
    "too_little_data": "too few valid points in the search window (see run.min_window_fraction); value is NaN",
    "level_missing": "a pressure level the metric needs lies outside the data's levels; value is NaN",
    "no_half_max": "the wind does not fall to half its maximum on one side of the jet; width is NaN",
    "lowpass_window_incomplete": "the low-pass filter window reaches past the record's ends or across a gap in time; value is NaN",
    "weak_peak": "the poleward eddy momentum flux or energy transport peaks below its threshold (eddies.min_momentum_flux_m2_s2, energy.min_transport_pw): the latitude is NaN, the peak value is kept",
    "time_mean_input": "the input's time step exceeds eddies.max_time_step_days (e.g. monthly means): the eddy and energy fluxes contain only the time-mean flow (mean circulation and stationary eddies), the transient eddies are missing; value kept",
    "time_step_unknown": "a single time step, so it is unknown whether transient eddies are resolved; eddy and energy flux value kept",
    "cells_out_of_order": "the southern cell's minimum lies north of the northern cell's maximum; boundary is NaN",
    "column_too_short": "the pressure window holds fewer than 3 levels, or the column at the wind maximum fewer than 3 valid levels or the same wind just above or below it, so a jet core cannot be located in the vertical; value is NaN",
    "extremum_next_to_missing_data": "a neighbour of the extremum is missing, so the true extremum may lie in the gap; value is NaN",
    "weak_jet_core": "the wind maximum in a jet-core window is weaker than cores.min_core_speed_m_s: no jet; value is NaN",
    "merged_jets": "the subtropical and eddy-driven windows give the same core (one merged jet): reported once, as the subtropical core ('ok;merged_jets'), the eddy-driven core is NaN",
    "provisional_data": "appended after ';' (e.g. 'ok;provisional_data'): the time step comes from a provisional data stream (expver other than 1) because the final one has no data there",
}


def usable(flags):
    """Rows whose value is computed as defined: flag ``ok``, possibly followed by notes after ';'
    (e.g. ``ok;provisional_data``). Works on a string or on a pandas Series of strings."""
    if isinstance(flags, str):
        return flags.split(";", 1)[0] == "ok"
    return flags.astype(str).str.split(";", n=1).str[0] == "ok"
