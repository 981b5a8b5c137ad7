"""The command line's help: every option of every `pvwb` command is explained, `info --help`
shows only info's own options, one name (--overwrite) for replacing an output file, `serve`
options named by the project, and a case given as several files split by time."""
from __future__ import annotations

import argparse
import subprocess
import sys

import numpy as np
import pytest

from workbench import cli

COMMANDS = sorted(cli.COMMANDS)


def _parser(monkeypatch, command):
    """The argparse parser a command builds (caught when it parses its arguments)."""
    caught = []

    class Caught(Exception):
        pass

    def grab(self, args=None, namespace=None):
        caught.append(self)
        raise Caught

    monkeypatch.setattr(cli.Parser, "parse_args", grab)
    import importlib

    mod = importlib.import_module(f"workbench.{cli.COMMANDS[command]}")
    with pytest.raises(Caught):
        mod.main(([command] if command in ("info", "invert") else []) + [])
    monkeypatch.undo()
    return caught[0]


def _visible(parser):
    return [a for a in parser._actions if a.help != argparse.SUPPRESS]


@pytest.mark.parametrize("command", COMMANDS)
def test_every_option_has_help(monkeypatch, command):
    parser = _parser(monkeypatch, command)
    assert parser.prog == f"pvwb {command}"
    for action in _visible(parser):
        text = (action.help or "").strip()
        assert len(text) >= 8, f"pvwb {command}: {action.option_strings or action.dest} has no help text"


@pytest.mark.parametrize("command", COMMANDS)
def test_one_overwrite_name(monkeypatch, command):
    """Commands that write files replace one only with --overwrite (older names hidden)."""
    parser = _parser(monkeypatch, command)
    names = {s for a in _visible(parser) for s in a.option_strings}
    writes = any(n in names for n in ("-o", "--output", "--plot", "--store"))
    assert not names & {"--force", "--replace", "--clobber"}
    if writes:
        assert "--overwrite" in names, f"pvwb {command} writes files but has no --overwrite"


def test_info_help_shows_only_its_own_options(capsys):
    assert cli.main(["info", "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: pvwb info")
    for foreign in ("--pieces", "--target", "--balance", "--overwrite", "--time ", "-o OUTPUT"):
        assert foreign not in out, foreign
    assert "--region" in out and "--times" in out
    assert cli.main(["invert", "--help"]) == 0
    assert "--pieces" in capsys.readouterr().out
    # an option info does not take is refused, in one line
    assert cli.main(["info", "--pieces", "x.json"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "unrecognized arguments: --pieces" in err


def test_serve_options_are_the_projects_own(monkeypatch, capsys):
    parser = _parser(monkeypatch, "serve")
    names = {s for a in _visible(parser) for s in a.option_strings}
    assert {"--page-port", "--page-address", "--data-folder", "--output-folder", "--open-page",
            "--token-file"} <= names
    assert not names & {"--port", "--address", "--show", "--token", "--password", "--data-dir",
                        "--output-dir"}
    # the access key: never on the command line; environment variable or file
    assert cli.main(["serve", "--token", "abcdefgh123"]) == 2
    assert "process list" in capsys.readouterr().err
    assert cli.main(["serve", "--page-address", "0.0.0.0"]) == 2
    err = capsys.readouterr().err
    assert "PVWB_TOKEN" in err and "--token-file" in err


def test_overwrite_replaces_and_force_still_works(tmp_path, monkeypatch):
    """--overwrite is accepted by the sample builder; --force stays as a hidden alias."""
    parser = _parser(monkeypatch, "sample")
    assert parser.parse_args(["--force"]).overwrite is True
    assert parser.parse_args(["--overwrite"]).overwrite is True
    assert parser.parse_args([]).overwrite is False


def _write_two_times(source, tmp_path):
    """The small invented test case cut in two files by time (one time each)."""
    import xarray as xr

    with xr.open_dataset(source) as ds:
        ds = ds.load()
    n = ds.sizes["time"]
    assert n >= 2
    paths = [tmp_path / "part_a.nc", tmp_path / "part_b.nc"]
    ds.isel(time=slice(0, n // 2)).to_netcdf(paths[0])
    ds.isel(time=slice(n // 2, n)).to_netcdf(paths[1])
    return ds, paths


def test_several_files_make_one_case(small_case_path, tmp_path, capsys):
    """`pvwb info a.nc b.nc` and `pvwb invert a.nc b.nc` read the files as one case."""
    ds, paths = _write_two_times(small_case_path, tmp_path)
    n = ds.sizes["time"]
    assert cli.main(["info", str(paths[1]), str(paths[0])]) == 0
    out = capsys.readouterr().out
    assert f"({n} times)" in out
    first = np.datetime_as_string(ds["time"].values[0], unit="m")
    assert first in out
    csv = tmp_path / "t.csv"
    assert cli.main(["--quiet", "invert", str(paths[0]), str(paths[1]), "--time", str(n - 1),
                     "-o", str(csv)]) == 0
    from workbench.export import read_csv

    table = read_csv(csv)
    assert "full inversion" in set(table["piece"]) and table["time"].nunique() == 1
    # a missing second file is one line naming it
    assert cli.main(["info", str(paths[0]), str(tmp_path / "missing.nc")]) == 2
    assert "missing.nc" in capsys.readouterr().err


def test_help_runs_as_a_program():
    """`pvwb <command> --help` in a fresh interpreter for the light commands (exit 0)."""
    for command in ("info", "invert", "track"):
        out = subprocess.run([sys.executable, "-m", "workbench.cli", command, "--help"],
                             capture_output=True, text=True, timeout=120)
        assert out.returncode == 0 and out.stdout.startswith(f"usage: pvwb {command}"), out.stderr
