"""No import cycles inside the package: every ``circtrack`` import (also those inside functions)
is an edge of a graph that must be acyclic; and every module imports first in a fresh interpreter."""

from __future__ import annotations

import ast
import os
import subprocess
import sys

import circtrack

ROOT = os.path.dirname(os.path.abspath(circtrack.__file__))


def modules(root=ROOT, package="circtrack"):
    """Module name -> file of every module under ``root``."""
    out = {}
    for d, _, files in os.walk(root):
        for f in files:
            if f.endswith(".py"):
                rel = os.path.relpath(os.path.join(d, f), root)[:-3].split(os.sep)
                if rel[-1] == "__init__":
                    rel = rel[:-1]
                out[".".join([package, *rel])] = os.path.join(d, f)
    return out


def import_graph(mods, package="circtrack"):
    """Module -> set of package modules it imports (``from A import b``: A.b when that is a module)."""
    graph = {}
    for name, path in mods.items():
        with open(path) as f:
            tree = ast.parse(f.read(), path)
        edges = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                edges |= {a.name for a in node.names if a.name.split(".")[0] == package}
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0 \
                    and node.module.split(".")[0] == package:
                for a in node.names:
                    sub = f"{node.module}.{a.name}"
                    edges.add(sub if sub in mods else node.module)
        graph[name] = {e for e in edges if e in mods and e != name}
    return graph


def find_cycle(graph):
    """One cycle as a list of modules, or None."""
    state, stack = {}, []

    def visit(n):
        state[n] = "open"
        stack.append(n)
        for m in sorted(graph.get(n, ())):
            if state.get(m) == "open":
                return stack[stack.index(m):] + [m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        stack.pop()
        state[n] = "done"
        return None

    for n in sorted(graph):
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None


def test_the_package_has_no_import_cycle():
    graph = import_graph(modules())
    assert "circtrack.engine.run" in graph and "circtrack.update.steps" in graph
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph))


def test_the_cycle_check_finds_a_cycle(tmp_path):
    pkg = tmp_path / "circtrack"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "a.py").write_text("def f():\n    from circtrack.sub import b\n")     # inside a function counts
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "sub" / "b.py").write_text("import numpy\nfrom circtrack import a\n")
    cyc = find_cycle(import_graph(modules(str(pkg))))
    assert cyc is not None and set(cyc) == {"circtrack.a", "circtrack.sub.b"}
    (pkg / "sub" / "b.py").write_text("from circtrack import sub\n")
    assert find_cycle(import_graph(modules(str(pkg)))) is None


def test_registry_and_update_stay_out_of_their_importers():
    graph = import_graph(modules())
    assert not {m for m in graph["circtrack.registry"] if m.startswith("circtrack.metrics")}
    update = {m for n, es in graph.items() if n.startswith("circtrack.update") for m in es}
    assert "circtrack.cli" not in update


def test_every_module_imports_first():
    """Each module imported first, with no circtrack module loaded before (a cycle would fail for
    some order); third-party libraries stay loaded between modules, to keep this fast."""
    names = sorted(modules())
    code = ("import importlib, sys\n"
            "bad = []\n"
            "for n in sys.argv[1:]:\n"
            "    for m in [m for m in sys.modules if m == 'circtrack' or m.startswith('circtrack.')]:\n"
            "        del sys.modules[m]\n"
            "    try:\n"
            "        importlib.import_module(n)\n"
            "    except Exception as e:\n"
            "        bad.append(f'{n}: {type(e).__name__}: {e}')\n"
            "print('\\n'.join(bad))\n")
    out = subprocess.run([sys.executable, "-c", code, *names], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0 and out.stdout.strip() == "", out.stdout + out.stderr


HEAVY = ("xarray", "pandas", "dask", "scipy", "matplotlib", "distributed", "h5py", "netCDF4")


def _loaded_after(code, *argv):
    """The HEAVY libraries loaded when ``code`` has run in a fresh interpreter (also when it exits)."""
    probe = ("import atexit, sys\n"
             f"atexit.register(lambda: print('LOADED', *[m for m in {HEAVY!r} if m in sys.modules]))\n"
             + code)
    out = subprocess.run([sys.executable, "-c", probe, *argv], capture_output=True, text=True, timeout=600)
    line = [x for x in out.stdout.splitlines() if x.startswith("LOADED")]
    assert line, out.stdout + out.stderr
    return set(line[-1].split()[1:]), out.stdout


def test_the_command_line_loads_its_commands_and_libraries_when_used():
    """Importing the CLI (every command starts so) loads no data library: `circtrack metrics`,
    --version and --help stay quick, and `track` does not load the other commands' modules."""
    assert _loaded_after("import circtrack.cli")[0] == set()
    cli = "import sys; from circtrack.cli import main\nsys.argv[0] = 'circtrack'\nmain()"
    assert _loaded_after(cli, "metrics")[0] == set()
    assert _loaded_after(cli, "--version")[0] == set()
    help_text = _loaded_after(cli, "--help")[1]            # lists every command, also those loaded lazily
    assert all(f"  {c} " in help_text for c in ("track", "update", "zonal-means", "trend", "plot", "spread"))


def test_track_never_loads_plotting_statistics_or_a_cluster(tmp_path):
    """A default `circtrack track` (worker processes): this process needs xarray for the detection,
    but never matplotlib, scipy or dask.distributed, nor the modules of the other commands."""
    from tests.conftest import make_dataset, write

    ds = make_dataset(6)
    paths = [write(ds.isel(time=slice(k, k + 3)), tmp_path / f"part_{k}.nc") for k in (0, 3)]
    code = ("import sys; from circtrack.cli import main\nsys.argv[0] = 'circtrack'\n"
            "import atexit\n"
            "atexit.register(lambda: print('OTHER', *[m for m in sys.modules if m.startswith("
            "('circtrack.update', 'circtrack.cli_findings', 'circtrack.cli_fields', 'circtrack.plot'))]))\n"
            "main()\n")
    loaded, out = _loaded_after(code, "track", *paths, "-o", str(tmp_path / "out.csv"), "-q", "--label", "x")
    assert (tmp_path / "out.csv").exists()
    assert not loaded & {"scipy", "matplotlib", "distributed"}, loaded
    assert [x for x in out.splitlines() if x.startswith("OTHER")] == ["OTHER"], out
