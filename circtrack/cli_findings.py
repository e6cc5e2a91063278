"""Commands that turn a circtrack CSV into findings: trend, season, plot. No science in here."""

from __future__ import annotations

import json
import os
import re

import click

from circtrack.cli_support import guarded
from circtrack.errors import InputError, UsageError
from circtrack.flags import usable

CALENDARS = ("standard", "gregorian", "proleptic_gregorian", "julian", "noleap", "365_day",
             "all_leap", "366_day", "360_day")


def _load(path):
    """Read and validate a circtrack CSV; return (table, path)."""
    from circtrack import stats as S

    if not os.path.exists(path):
        raise InputError(f"{path}: no such file; give the CSV written by 'circtrack track -o FILE.csv'")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a directory; give the CSV written by 'circtrack track -o FILE.csv'")
    try:
        df = S.read_csv(path)
    except Exception as e:  # pandas raises several types for unreadable text
        raise InputError(f"{path}: not a readable CSV ({type(e).__name__}); give the CSV written by 'circtrack track'")
    missing = [c for c in S.REQUIRED if c not in df.columns]
    if missing:
        raise InputError(f"{path}: missing column(s) {', '.join(missing)}; expected the 'circtrack track' header "
                         f"{','.join(S.REQUIRED)}")
    cols = list(df.columns)
    if cols.index("hemisphere") < cols.index("time"):
        raise InputError(f"{path}: column 'time' must come before 'hemisphere' (circtrack track layout)")
    _refuse_duplicates_and_mixed_units(df, path)
    if not usable(df["flag"]).any():
        raise InputError(f"{path}: no rows with flag 'ok'; rerun 'circtrack track' or check its flag column")
    try:
        S.parse_times(df.loc[usable(df["flag"]), "time"])
    except S.StatsInputError as e:
        raise InputError(f"{path}: {e}; times must be ISO 8601 as written by 'circtrack track'")
    return df


def _refuse_duplicates_and_mixed_units(df, path):
    """A key (source, time, extra keys, hemisphere, sector, metric) twice, or two units for one
    metric, would mix series silently: refused with the CSV line numbers."""
    from circtrack import stats as S

    keys, _ = S.key_columns(df)
    dup = df.duplicated(subset=["time", *keys], keep=False)
    if dup.any():
        rows = df.index[dup]
        first = df.loc[rows[0]]
        twin = rows[1:][(df.loc[rows[1:], ["time", *keys]] == first[["time", *keys]]).all(axis=1)][0]
        raise InputError(f"{path}: lines {rows[0] + 2} and {twin + 2} hold the same key ({first['metric']}, "
                         f"{first['hemisphere']}, {first['sector']}, {first['time']}); is it two CSVs joined? "
                         "keep one row per key (rerun 'circtrack track')")
    units = df.groupby("metric", sort=True)["units"].unique()
    mixed = units[units.map(len) > 1]
    if len(mixed):
        m = mixed.index[0]
        raise InputError(f"{path}: metric {m} has rows in different units ({', '.join(sorted(mixed[m]))}); "
                         "use one unit per metric (rerun 'circtrack track' on one data set)")


def _calendar(path, df, given):
    """--calendar, else the provenance sidecar of 'circtrack track', else a guess from the dates."""
    from circtrack import stats as S
    from circtrack.output import sidecar_path

    if given:
        return given
    side = sidecar_path(os.path.realpath(path))        # beside the target when CSV is a symbolic link
    if not os.path.exists(side):
        side = sidecar_path(path)
    if os.path.exists(side):
        try:
            with open(side) as f:
                cal = json.load(f).get("calendar")
            if cal:
                return str(cal)
        except (OSError, ValueError):
            pass
    return S.infer_calendar(df.loc[usable(df["flag"]), "time"])


def _metric_ids(metrics, df, path):
    if not metrics:
        return None
    ids = [m.strip() for m in metrics.split(",") if m.strip()]
    known = set(df["metric"].unique())
    unknown = [m for m in ids if m not in known]
    if unknown:
        raise UsageError(f"--metrics: {', '.join(unknown)} not in {path}; it has {', '.join(sorted(known))}")
    return ids


def _note_left_out(df, ids, what):
    """One stderr line naming the metrics (of ``ids``, or all) that have rows but none flagged ``ok``:
    ``what`` (trends, the seasonal cycle, pictures) uses only ``ok`` rows, so they are left out."""
    d = df if ids is None else df[df["metric"].isin(ids)]
    ok = usable(d["flag"])
    gone = sorted(set(d["metric"]) - set(d.loc[ok, "metric"]))
    if not gone:
        return
    flag = d.loc[d["metric"].isin(gone), "flag"].astype(str).value_counts().index[0]
    click.echo(f"circtrack: note: {len(gone)} metric(s) left out of {what}, no row flagged ok: "
               f"{', '.join(gone)} (most common flag: {flag}; only rows flagged ok are used, see the "
               "flag list in the README)", err=True)


def _outputs(csv_path, *named):
    """Before reading: each output's target (stdout, stream or file); none of them is the input CSV
    (or its sidecar) or another output. ``named``: ``(option, path or None)``."""
    from circtrack import guards as G
    from circtrack.output import check_output_path, resolve_target, sidecar_path

    targets, outs = [], []
    for how, path in named:
        if path in (None, "-"):
            targets.append(resolve_target("-"))
            continue
        t = check_output_path(path, beside_names=())
        targets.append(t)
        outs.append((f"{how} {path}", path))
    ins = [csv_path] + ([sidecar_path(csv_path)] if csv_path else [])
    G.refuse_outputs_among_inputs(outs, [p for p in ins if p])
    return targets


def _emit(pairs):
    """``pairs``: ``[(target, text)]``; files are committed together (all or nothing), then streams."""
    from circtrack import output as O

    files = [(t.path, text) for t, text in pairs if t.kind == "file"]
    if files:
        O.commit(files)
    for t, text in pairs:
        if t.kind != "file":
            O.emit(t, text)


def _wrap(fn_stats, path):
    from circtrack import stats as S

    try:
        return fn_stats()
    except S.StatsInputError as e:
        raise InputError(f"{path}: {e}")


_calendar_opt = click.option("--calendar", type=click.Choice(CALENDARS), default=None,
                             help="Calendar of the times (default: from the provenance sidecar, else guessed).")


_min_years_opt = click.option(
    "--min-years", type=click.IntRange(3), default=None, metavar="N",
    help="Fit a trend only to series of at least N annual (or seasonal) means (default 10).")


@click.command()
@click.argument("csv_path", metavar="CSV")
@click.option("-o", "--output", default=None, help="Output CSV (default: stdout).")
@click.option("--poleward-positive", is_flag=True, help="Flip SH latitude metrics so that poleward is positive.")
@click.option("--metrics", default=None, metavar="ID,...", help="Comma-separated metric ids (default: all).")
@_min_years_opt
@_calendar_opt
@guarded
def trend(csv_path, output, poleward_positive, metrics, min_years, calendar):
    """Trends per decade (OLS with AR(1)-adjusted CI; Theil-Sen with Mann-Kendall p) per season.

    Series with fewer than --min-years annual or seasonal means get no rows (a note on stderr says
    how many); when no series is long enough the command fails with exit status 1."""
    from circtrack import stats as S

    (target,) = _outputs(csv_path, ("-o", output))
    df = _load(csv_path)
    ids = _metric_ids(metrics, df, csv_path)
    cal = _calendar(csv_path, df, calendar)
    need = min_years or S.MIN_TREND_YEARS
    short = []
    tab = _wrap(lambda: S.trends(df, poleward_positive=poleward_positive, calendar=cal, metrics=ids,
                                 min_years=need, too_short=short), csv_path)
    if tab.empty:
        if short:
            longest = max(n for _, n in short)
            raise InputError(f"{csv_path}: too short for a trend: the longest series has {longest} complete "
                             f"year(s) or season(s), at least {need} are needed; lower --min-years (3 at least) to "
                             "fit one anyway, or use 'circtrack season' for the seasonal cycle")
        raise InputError(f"{csv_path}: no complete season or year to fit; trends need whole months of 'ok' data")
    _note_left_out(df, ids, "the trends")
    if short:
        (k, n) = short[0]
        click.echo(f"circtrack: note: {len(short)} series with fewer than {need} complete years or seasons left "
                   f"out (e.g. {' '.join(str(x) for x in k[1:])}: {n}); lower --min-years to include them",
                   err=True)
    _emit([(target, S.table_to_csv(tab))])


def _parse_base(base):
    if base is None:
        return None
    m = re.fullmatch(r"\s*(-?\d+)\s*[:\-]\s*(-?\d+)\s*", base)
    if not m or int(m.group(1)) > int(m.group(2)):
        raise UsageError(f"--base '{base}': expected FIRST:LAST years, e.g. --base 1981:2010")
    return int(m.group(1)), int(m.group(2))


@click.command()
@click.argument("csv_path", metavar="CSV")
@click.option("-o", "--output", default=None, help="Climatology CSV (default: stdout).")
@click.option("--base", default=None, metavar="Y0:Y1", help="Base period for climatology/anomalies (default: all years).")
@click.option("--anomalies", default=None, metavar="OUT2.csv", help="Also write monthly anomalies to this CSV.")
@click.option("--metrics", default=None, metavar="ID,...", help="Comma-separated metric ids (default: all).")
@_calendar_opt
@guarded
def season(csv_path, output, base, anomalies, metrics, calendar):
    """Monthly climatology, seasonal-cycle amplitude and poleward-extreme month; optional anomalies."""
    from circtrack import stats as S

    b = _parse_base(base)
    targets = _outputs(csv_path, ("-o", output), ("--anomalies", anomalies))
    df = _load(csv_path)
    ids = _metric_ids(metrics, df, csv_path)
    cal = _calendar(csv_path, df, calendar)
    try:
        clim, anom = S.seasonal_cycle(df, base=b, calendar=cal, metrics=ids)
    except S.StatsInputError as e:
        raise UsageError(f"{csv_path}: {e}; choose --base years inside the record")
    _note_left_out(df, ids, "the seasonal cycle")
    _emit([(targets[0], S.table_to_csv(clim))] + ([(targets[1], S.table_to_csv(anom))] if anomalies else []))


@click.command("spread")
@click.argument("csv_path", metavar="CSV")
@click.option("-o", "--output", default=None, help="Output CSV (default: stdout).")
@guarded
def spread(csv_path, output):
    """How far apart the definitions lie: per time (or season and trend method) the n, min, max, range,
    mean and standard deviation across the variants of each metric (track --vary) and across the
    metrics of each feature group ('circtrack metrics' lists them); on a 'trend' table also whether
    the signs of the trends agree."""
    from circtrack import spread as SP
    from circtrack import stats as S
    from circtrack.metrics import groups

    if not os.path.exists(csv_path) or os.path.isdir(csv_path):
        raise InputError(f"{csv_path}: no such file; give a CSV written by 'circtrack track' or 'circtrack trend'")
    (target,) = _outputs(csv_path, ("-o", output))
    try:
        df = S.read_csv(csv_path)
    except Exception as e:  # pandas raises several types for unreadable text
        raise InputError(f"{csv_path}: not a readable CSV ({type(e).__name__}); give a CSV written by 'circtrack track'")
    try:
        tab = SP.spread(df, {g.id: g.metric_ids for g in groups().values()})
    except SP.SpreadInputError as e:
        raise InputError(f"{csv_path}: {e}; give a CSV written by 'circtrack track' or 'circtrack trend'")
    if tab.empty:
        raise InputError(f"{csv_path}: nothing to compare: no 'variant' column (run 'circtrack track --vary "
                         "KEY=V1,V2') and no two metrics of one feature group with 'ok' values")
    _emit([(target, S.table_to_csv(tab, int_cols=("n", "n_positive", "n_negative")))])


@click.command()
@click.argument("csv_path", metavar="CSV", required=False)
@click.option("-o", "--output", required=True,
              help="Figure file: .png, .pdf or .svg. One page per metric family: a multi-page PDF, or "
                   "OUT-FAMILY.png/.svg per page when there are several.")
@click.option("--metrics", default=None, metavar="ID,...", help="Comma-separated metric ids (default: all).")
@click.option("--poleward-positive/--degrees-north", default=True,
              help="Latitudes poleward-positive, NH and SH on one axis (default), or in degrees_north with "
                   "NH and SH on separate axes.")
@_min_years_opt
@_calendar_opt
@click.option("--section", "section", default=None, metavar="DATAFILE",
              help="Instead of a CSV: the latitude-pressure cross-section of one time step of this data file "
                   "([u], streamfunction, detected Hadley edges and jets).")
@click.option("--time", "time", default=None, metavar="DATE",
              help="With --section: the time step, as in the CSV 'time' column (default: the first); with "
                   "--cores-strip: the time step drawn (default: the mean over all).")
@click.option("--log-pressure", is_flag=True, help="With --section: logarithmic pressure axis.")
@click.option("-c", "--config", "config", default=None, help="With --section: TOML config, as for 'track'.")
@click.option("--var", "variables", multiple=True, metavar="ROLE=NAME", help="With --section: as for 'track'.")
@click.option("--units", "units", multiple=True, metavar="ROLE=UNITS", help="With --section: as for 'track'.")
@click.option("--level", "levels", multiple=True, metavar="NAME=HPA", help="With --section: as for 'track'.")
@click.option("--cores-strip", "cores_strip", default=None, metavar="CORES.csv",
              help="Instead of a CSV of indices: the jet cores per longitude written by 'track --cores-by-longitude' "
                   "(longitude x, core latitude y, speed as colour) at --time DATE, or the mean over its time steps.")
@guarded
def plot(csv_path, output, metrics, poleward_positive, min_years, calendar, section, time, log_pressure, config,
         variables, units, levels, cores_strip):
    """Time series with OLS trend and 95 % band, and the monthly seasonal cycle, per metric, one page per
    metric family; or, with --section DATAFILE, the latitude-pressure cross-section of one time step with
    the detected positions."""
    from circtrack import plots
    from circtrack import stats as S

    if cores_strip:
        from circtrack import plots_cores as PC

        src = click.get_current_context().get_parameter_source("poleward_positive")
        named = src is not None and src.name == "COMMANDLINE"
        PC.check_strip_options(cores_strip, {"CSV": csv_path, "--section": section, "--metrics": metrics,
                                             "--poleward-positive/--degrees-north": named,
                                             "--min-years": min_years, "--calendar": calendar,
                                             "--log-pressure": log_pressure, "-c/--config": config,
                                             "--var": variables, "--units": units, "--level": levels})
        if os.path.splitext(output)[1].lower().lstrip(".") not in plots.FORMATS:
            raise UsageError(f"-o {output}: unknown figure format; end the name with .png, .pdf or .svg")
        PC.save_strip(PC.load_table(cores_strip), output, time=time)
        return
    if csv_path and section:
        raise UsageError(f"give either a CSV ({csv_path}) or --section DATAFILE ({section}), not both")
    if not csv_path and not section:
        raise UsageError("give a CSV written by 'circtrack track', or --section DATAFILE for a cross-section")
    ext = os.path.splitext(output)[1].lower().lstrip(".")
    if ext not in plots.FORMATS:
        raise UsageError(f"-o {output}: unknown figure format; end the name with .png, .pdf or .svg")
    if section:
        used = [n for n, v in (("--metrics", metrics), ("--min-years", min_years),
                               ("--calendar", calendar)) if v]
        src = click.get_current_context().get_parameter_source("poleward_positive")
        if src is not None and src.name == "COMMANDLINE":
            used.append("--poleward-positive/--degrees-north")
        if used:
            raise UsageError(f"{', '.join(used)}: for the time-series plot of a CSV, not for --section")
        _section(section, output, time, log_pressure, config, variables, units, levels)
        return
    used = [n for n, v in (("--time", time), ("--log-pressure", log_pressure), ("-c/--config", config),
                           ("--var", variables), ("--units", units), ("--level", levels)) if v]
    if used:
        raise UsageError(f"{', '.join(used)}: only with --section DATAFILE")
    _outputs(csv_path, ("-o", output))
    df = _load(csv_path)
    ids = _metric_ids(metrics, df, csv_path)
    cal = _calendar(csv_path, df, calendar)
    need = min_years or S.MIN_TREND_YEARS
    _note_left_out(df, ids, "the pictures")
    written = _wrap(lambda: plots.save(df, output, metrics=ids, calendar=cal, poleward_positive=poleward_positive,
                                       min_years=need), csv_path)
    if len(written) > 1:
        click.echo(f"circtrack: wrote {len(written)} pages: {', '.join(written)}", err=True)


def _section(path, output, time, log_pressure, config, variables, units=(), levels=()):
    from circtrack import config as C
    from circtrack import section as SEC
    from circtrack.cli_support import apply_units, parse_vars
    from circtrack.output import check_output_path

    from circtrack import guards as G
    from circtrack.inputs.files import expand

    cfg = apply_units(C.load(config), units, levels)
    overrides = parse_vars(variables)
    check_output_path(output, beside_names=())
    G.refuse_outputs_among_inputs([(f"-o {output}", output)], expand([path]))
    try:
        sec = SEC.section_data(path, cfg, time=time, overrides=overrides)
    except InputError as e:           # the engine's line, without its hint for 'track' options
        raise InputError(re.sub(r",?\s*or pass --on-bad-file skip", "", str(e)))
    SEC.save(sec, output, log_pressure=log_pressure)
