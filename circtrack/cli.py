"""Command line: parses, configures, calls. No science in here."""

from __future__ import annotations

import sys

import click

from circtrack import __version__
from circtrack.cli_support import OneLineGroup, _fail, guarded, parse_vars, track_options  # noqa: F401
from circtrack.errors import UsageError


@click.group(cls=OneLineGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="circtrack")
@click.option("--debug", is_flag=True, help="Show tracebacks on errors.")
def main(debug):
    """circtrack: time series of general-circulation indices from gridded climate data."""


def _run_track(paths, output, config, variables, metrics, label, sectors, workers, scheduler, on_bad_file, quiet,
               repeated_times=None, vary=()):
    from circtrack import config as C
    from circtrack import variants as V
    from circtrack import engine, guards as G, output as O
    from circtrack.cluster import scheduler_context
    from circtrack.inputs.files import expand

    if workers and scheduler:
        raise UsageError("--workers and --scheduler exclude each other; give one")
    cfg = V.apply(C.load(config), vary)
    if repeated_times:
        cfg["run"]["repeated_times"] = repeated_times
    if on_bad_file:
        cfg["run"]["on_bad_file"] = on_bad_file          # so the sidecar records the policy used
    ids = [m.strip() for m in metrics.split(",") if m.strip()] if metrics else None
    secs = [engine.parse_sector(s) for s in sectors]
    G.check_cli_labels(label, sectors, secs)
    target = O.check_output_path(output)
    G.refuse_data_file_as_output(output)
    files = expand(list(paths))             # before anything is read: OUT must not be an input
    outputs = [("-o", output)] + ([("the sidecar of -o", O.sidecar_path(target.path))] if target.kind == "file" else [])
    G.refuse_outputs_among_inputs(outputs, files)
    stamps = G.input_stamps(files)
    prog = engine.Progress(quiet=quiet)
    with scheduler_context(workers, scheduler, cfg):
        outcome = engine.track(files, cfg, metric_ids=ids, label=label, sectors=secs,
                               overrides=parse_vars(variables), progress=prog, on_bad_file=on_bad_file)
    G.refuse_changed_inputs(stamps)
    O.write(outcome, output, cfg, argv=["circtrack", *sys.argv[1:]])
    prog.done(len(outcome.columns["metric"]))
    return outcome


@main.command()
@track_options
@guarded
def track(**kw):
    """Compute circulation indices from PATH... (files, directories, globs, or - for a list on stdin)."""
    _run_track(**kw)


@main.command()
@click.argument("paths", nargs=-1, required=True)
@click.option("-c", "--config", "config", default=None, help="TOML config (for [variables] overrides).")
@click.option("--var", "variables", multiple=True, metavar="ROLE=NAME")
@guarded
def scan(paths, config, variables):
    """Show what was found in PATH..., which metrics can run, and what to add for the rest."""
    from circtrack import config as C
    from circtrack.scan import report

    cfg = C.load(config)
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


from circtrack.cli_findings import plot, season, spread, trend  # noqa: E402

for _cmd in (trend, season, spread, plot):
    main.add_command(_cmd)

from circtrack.update import make_command as _make_update  # noqa: E402

main.add_command(_make_update())


if __name__ == "__main__":  # pragma: no cover
    main()
