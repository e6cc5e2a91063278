"""Command line: parses, configures, calls. No science in here."""

from __future__ import annotations

import sys

import click

from circtrack import __version__
from circtrack.cli_support import (OUTPUTS_CLOSED, OneLineGroup, _fail, apply_storage, apply_units,  # noqa: F401
                                   guarded, parse_vars, storage_options, track_options)
from circtrack.errors import UsageError


class LazyGroup(OneLineGroup):
    """The group with its other commands imported when asked for: ``circtrack track`` loads neither
    the commands on CSV files (trend, season, spread, plot) nor zonal-means nor update, and
    ``circtrack metrics`` or ``--version`` not xarray (tests/test_imports.py)."""

    LAZY = {"trend": ("circtrack.cli_findings", "trend"), "season": ("circtrack.cli_findings", "season"),
            "spread": ("circtrack.cli_findings", "spread"), "plot": ("circtrack.cli_findings", "plot"),
            "zonal-means": ("circtrack.cli_fields", "zonal_means"), "update": ("circtrack.update", "make_command")}

    def list_commands(self, ctx):
        return sorted(set(self.commands) | set(self.LAZY))

    def get_command(self, ctx, name):
        if name not in self.commands and name in self.LAZY:
            import importlib

            module, attr = self.LAZY[name]
            cmd = getattr(importlib.import_module(module), attr)
            self.add_command(cmd() if attr == "make_command" else cmd, name)
        return super().get_command(ctx, name)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="circtrack")
@click.option("--debug", is_flag=True, help="Show tracebacks on errors.")
def main(debug):
    """circtrack: time series of general-circulation indices from gridded climate data."""


def _run_track(paths, output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file, quiet,
               repeated_times=None, units=(), levels=(), fail_on_empty=False, anonymous=False, cache_dir=None,
               profile=False, cores_by_longitude=None, vary=()):
    from circtrack import config as C
    from circtrack import variants as V
    from circtrack import engine, guards as G, output as O
    from circtrack.cluster import scheduler_context
    from circtrack.inputs.files import expand

    if workers and scheduler:
        raise UsageError("--workers and --scheduler exclude each other; give one")
    cfg = apply_storage(apply_units(V.apply(C.load(config), vary), units, levels), anonymous, cache_dir)
    if repeated_times:
        cfg["run"]["repeated_times"] = repeated_times
    if on_bad_file:
        cfg["run"]["on_bad_file"] = on_bad_file          # so the sidecar records the policy used
    ids = [m.strip() for m in metrics.split(",") if m.strip()] if metrics else None
    secs = [engine.parse_sector(s) for s in sectors]
    G.check_cli_labels(label, sectors, secs)
    target = O.check_output_path(output)
    G.refuse_data_file_as_output(output)
    files = expand(list(paths), cfg=cfg)    # before anything is read: OUT must not be an input
    outputs = [("-o", output)] + ([("the sidecar of -o", O.sidecar_path(target.path))] if target.kind == "file" else [])
    if cores_by_longitude:
        side = _check_side_file(cores_by_longitude)
        outputs += [("--cores-by-longitude", side), ("the sidecar of --cores-by-longitude", O.sidecar_path(side))]
    G.refuse_outputs_among_inputs(outputs, files)
    stamps = G.input_stamps(files, cfg)
    prog = engine.Progress(quiet=quiet)
    from circtrack.engine import profile as PR
    PR.enable(profile)
    try:
        with scheduler_context(workers, scheduler, cfg):
            outcome = engine.track(files, cfg, metric_ids=ids, label=label, sectors=secs,
                                   overrides=parse_vars(variables), progress=prog, on_bad_file=on_bad_file,
                                   cores_by_longitude=bool(cores_by_longitude))
        G.refuse_changed_inputs(stamps, cfg)
        with PR.timed(PR.STAGES, "write CSV and provenance"):
            tables = [(outcome.tables["cores_by_longitude"], cores_by_longitude)] if cores_by_longitude else []
            O.write(outcome, output, cfg, argv=["circtrack", *sys.argv[1:]], tables=tables)
        if profile:
            click.echo(PR.table(), err=True)
    finally:
        PR.enable(False)
    prog.done(len(outcome.columns["metric"]))
    from circtrack import summary
    summary.report(summary.of_outcome(outcome), click.echo, fail_on_empty)   # also with --quiet
    OUTPUTS_CLOSED["done"] = True       # O.write committed and closed every output
    return outcome


def _check_side_file(path):
    """``--cores-by-longitude FILE``: a regular file of its own in a writable directory; its real path."""
    import os

    from circtrack import output as O

    t = O.resolve_target(path)
    if t.kind != "file":
        raise UsageError(f"--cores-by-longitude {path}: give the name of a regular file (not -, a directory, "
                         "a device or a pipe), e.g. cores_by_lon.csv")
    d = os.path.dirname(t.path)
    if not os.path.isdir(d) or not os.access(d, os.W_OK | os.X_OK):
        raise UsageError(f"--cores-by-longitude {path}: the directory {d} does not exist or is not writable; "
                         f"create it first (mkdir -p {d}) or choose another")
    return t.path


@main.command()
@track_options
@click.option("--profile", is_flag=True,
              help="Print to stderr where the time went: each stage, each part of the reduce tasks, each family.")
@click.option("--cores-by-longitude", "cores_by_longitude", default=None, metavar="FILE.csv",
              help="Also write the jet cores at every longitude (or [cores] longitude_band_deg band) to this tidy "
                   "CSV, with a lon key column (for maps; 'circtrack plot --cores-strip FILE.csv' draws it).")
@guarded
def track(**kw):
    """Compute circulation indices from PATH... (files, directories, globs, or - for a list on stdin)."""
    _run_track(**kw)


@main.command()
@click.argument("paths", nargs=-1, required=True)
@click.option("-c", "--config", "config", default=None, help="TOML config (for [variables] overrides).")
@click.option("--var", "variables", multiple=True, metavar="ROLE=NAME")
@click.option("--units", "units", multiple=True, metavar="ROLE=UNITS", help="As for track.")
@click.option("--level", "levels", multiple=True, metavar="NAME=HPA", help="As for track.")
@storage_options
@guarded
def scan(paths, config, variables, units, levels, anonymous, cache_dir):
    """Show what was found in PATH..., which metrics can run, and what to add for the rest."""
    from circtrack import config as C
    from circtrack.scan import report

    cfg = apply_storage(apply_units(C.load(config), units, levels), anonymous, cache_dir)
    click.echo(report(list(paths), cfg, {**cfg.get("variables", {}), **parse_vars(variables)}))


@main.command("metrics")
@click.option("--format", "fmt", type=click.Choice(["text", "csv", "markdown"]), default="text")
@guarded
def metrics_cmd(fmt):
    """List the metric catalogue: id, inputs, units, definition, published source."""
    from circtrack.metrics import catalogue, groups
    from circtrack.registry import hemispheres

    cat = catalogue()
    if fmt == "csv":
        import csv
        w = csv.writer(sys.stdout, lineterminator="\n")
        w.writerow(["id", "rows", "inputs", "units", "sectors", "definition", "reference"])
        for m in cat.values():
            w.writerow([m.id, "/".join(hemispheres(m)), " ".join(m.inputs), m.units, "yes" if m.sectors else "no",
                        m.definition, m.reference])
        return
    if fmt == "markdown":
        click.echo("| metric id | rows | inputs | units | definition | reference |\n|---|---|---|---|---|---|")
        for m in cat.values():
            click.echo(f"| `{m.id}` | {'/'.join(hemispheres(m))} | {' '.join(m.inputs)} | {m.units} | {m.definition} | {m.reference} |")
        click.echo("\n| feature group | metrics | source |\n|---|---|---|")
        for g in groups().values():
            click.echo(f"| `{g.id}` ({g.long_name}) | {', '.join(f'`{i}`' for i in g.metric_ids)} | {g.reference} |")
        return
    for m in cat.values():
        click.echo(f"{m.id}  [{'/'.join(hemispheres(m))}; {m.units}; needs {' '.join(m.inputs)}"
                   f"{'; per sector too' if m.sectors else ''}]")
        click.echo(f"    {m.long_name}: {m.definition}")
        click.echo(f"    source: {m.reference}")
    click.echo("\nfeature groups (metrics marking the same feature; 'circtrack spread' compares them):")
    for g in groups().values():
        click.echo(f"{g.id}: {g.long_name}: {', '.join(g.metric_ids)}")
        click.echo(f"    source: {g.reference}")


if __name__ == "__main__":  # pragma: no cover
    main()
