"""Rough edges of the command line (issue 16): broken pipes, missing packages, the README's
Makefile rule."""

import os
import re
import shutil
import subprocess
import sys

import pytest
from click.testing import CliRunner

from circtrack.cli import main
from circtrack.cli_support import BROKEN_PIPE_EXIT, INSTALL_HINTS

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _env():
    return {**os.environ, "PYTHONPATH": ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}


@pytest.mark.parametrize("args", [["metrics"], ["metrics", "--format", "csv"], ["--help"]])
def test_a_closed_pipe_ends_quietly(args):
    """Like 'circtrack metrics | head -1': the reader goes away; nothing on stderr, exit 0 or 141."""
    p = subprocess.Popen([sys.executable, "-m", "circtrack.cli", *args], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, env=_env(), cwd=ROOT)
    p.stdout.close()                          # the reader has gone before the first line
    err = p.stderr.read().decode()
    code = p.wait()
    assert err == ""
    assert code in (0, BROKEN_PIPE_EXIT)


def test_closed_pipe_after_the_first_line_like_head(tmp_path):
    out = subprocess.run(f"'{sys.executable}' -m circtrack.cli metrics | head -1; echo \"status ${{PIPESTATUS[0]}}\"",
                         shell=True, executable="/bin/bash", capture_output=True, text=True, env=_env(), cwd=ROOT)
    assert out.stderr == ""
    first, status = out.stdout.splitlines()
    assert first.startswith("hadley_edge_lat")
    assert status in ("status 0", f"status {BROKEN_PIPE_EXIT}")


def test_a_missing_package_names_its_pip_install(tmp_path, monkeypatch):
    import builtins

    from tests.conftest import make_dataset

    store = tmp_path / "s.zarr"
    make_dataset(1).to_zarr(store, mode="w", consolidated=False)
    real = builtins.__import__

    def no_zarr(name, *a, **k):
        if name == "zarr" or name.startswith("zarr."):
            raise ModuleNotFoundError("No module named 'zarr'", name="zarr")
        return real(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", no_zarr)
    for mod in [m for m in sys.modules if m == "zarr" or m.startswith("zarr.")]:
        monkeypatch.delitem(sys.modules, mod)
    r = CliRunner().invoke(main, ["track", str(store), "-o", str(tmp_path / "o.csv"), "-q"])
    assert r.exit_code == 1
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "unexpected" not in lines[0]
    assert "zarr" in lines[0] and INSTALL_HINTS["zarr"] in lines[0]


def test_zarr_is_a_core_dependency():
    import tomllib

    with open(os.path.join(ROOT, "pyproject.toml"), "rb") as f:
        proj = tomllib.load(f)["project"]
    assert any(re.match(r"zarr\b", d) for d in proj["dependencies"])


@pytest.mark.skipif(shutil.which("make") is None, reason="make not installed")
def test_readme_makefile_rule_creates_its_directory(tmp_path):
    """The rule as printed in the README, run by make on a fresh tree (no indices/ yet)."""
    text = open(os.path.join(ROOT, "README.md")).read()
    rule = re.search(r"```make\n(.*?)```", text, re.S).group(1)
    assert "\t" in rule                                        # recipes need tabs
    (tmp_path / "Makefile").write_text(rule)
    data = tmp_path / "data" / "model_q"
    data.mkdir(parents=True)
    shutil.copy(os.path.join(ROOT, "sample_inputs", "model_q", "model_q_monthly_2031.nc"), data)
    (tmp_path / "params.toml").write_text("")
    bindir = tmp_path / "bin"
    bindir.mkdir()
    exe = bindir / "circtrack"
    exe.write_text(f"#!/bin/sh\nexec '{sys.executable}' -m circtrack.cli \"$@\"\n")
    exe.chmod(0o755)
    env = {**_env(), "PATH": f"{bindir}{os.pathsep}{os.environ['PATH']}"}
    out = subprocess.run(["make", "indices/model_q.csv"], cwd=tmp_path, env=env, capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "indices" / "model_q.csv").read_text().startswith("source,time,hemisphere")
