"""The zonal-means command: the zonal-mean fields and the streamfunction as CF netCDF. No science here."""

from __future__ import annotations

import os
import sys

import click

from circtrack.cli_support import apply_storage, apply_units, guarded, parse_vars, storage_options
from circtrack.errors import UsageError


@click.command("zonal-means")
@click.argument("paths", nargs=-1, required=True)
@click.option("-o", "--output", "output", required=True, help="Output netCDF file (.nc).")
@click.option("-c", "--config", "config", default=None, help="TOML file overriding configs/default.toml.")
@click.option("--var", "variables", multiple=True, metavar="ROLE=NAME",
              help="Use variable NAME for ROLE (ua va ta zg hus ps uas vas psl pr evspsbl rlut), as for 'track'.")
@click.option("--units", "units", multiple=True, metavar="ROLE=UNITS", help="As for 'track'.")
@click.option("--level", "levels", multiple=True, metavar="NAME=HPA", help="As for 'track'.")
@click.option("--label", default=None, help="Recorded as the file's 'source' attribute.")
@click.option("--sector", "sectors", multiple=True, metavar="NAME=LON0:LON1",
              help="Also the means over this longitude band (a 'sector' dimension, 'zonal' first).")
@click.option("--on-bad-file", type=click.Choice(["stop", "skip"]), default=None,
              help="Stop at an unreadable input (default) or skip it and report it.")
@click.option("--repeated-times", type=click.Choice(["refuse", "keep-first", "keep-last"]), default=None,
              help="A time step found in two files with different values, as for 'track'.")
@click.option("--workers", type=click.IntRange(1), default=None,
              help="Start a local dask.distributed cluster of N worker processes, as for 'track'.")
@click.option("--scheduler", default=None, metavar="ADDRESS", help="Use a running dask.distributed scheduler.")
@click.option("-q", "--quiet", is_flag=True, help="No progress output.")
@storage_options
@guarded
def zonal_means(paths, output, config, variables, units, levels, label, sectors, on_bad_file, repeated_times, workers,
                scheduler, quiet, anonymous, cache_dir):
    """Zonal means of the variables found in PATH..., their longitude coverage and the mass streamfunction
    (as 'track' computes it) as CF netCDF: (time, [member,] [sector,] plev, lat)."""
    from circtrack import config as C
    from circtrack import engine
    from circtrack import zonal_fields
    from circtrack.cluster import scheduler_context
    from circtrack.output import check_output_path

    if not output.lower().endswith((".nc", ".nc4")) or output == "-":
        raise UsageError(f"-o {output}: give a netCDF file name ending in .nc")
    if workers and scheduler:
        raise UsageError("--workers and --scheduler exclude each other; give one")
    cfg = apply_storage(apply_units(C.load(config), units, levels), anonymous, cache_dir)
    if repeated_times:
        cfg["run"]["repeated_times"] = repeated_times
    if on_bad_file:
        cfg["run"]["on_bad_file"] = on_bad_file
    secs = [engine.parse_sector(s) for s in sectors]
    check_output_path(output, beside_names=(), stream_ok=False)
    from circtrack import guards as G
    from circtrack.inputs.files import expand

    named = [p for p in paths if p != "-"]              # paths on stdin are read once, by the run
    if named:
        G.refuse_outputs_among_inputs([(f"-o {output}", output)], expand(named, cfg=cfg))
    prog = engine.Progress(quiet=quiet)
    with scheduler_context(workers, scheduler, cfg):
        run = zonal_fields.write(list(paths), output, cfg, overrides=parse_vars(variables), sectors=secs,
                                 label=label, on_bad_file=on_bad_file, progress=prog,
                                 argv=["circtrack", *sys.argv[1:]])
    if not quiet:
        click.echo(f"circtrack: wrote {os.path.basename(output)}: {run.times.size} time steps, "
                   f"{', '.join(run.plan.roles)}" + (", psi" if "va" in run.plan.roles else ""), err=True)
