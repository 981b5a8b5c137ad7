"""Hemispheric and global grids: longitudes of periodic grids, equator refused before any work."""
from __future__ import annotations

import warnings

import numpy as np

import workbench as wb
from workbench.cli import main

from conftest import wave_dataset


def _open(lat, lon):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return wb.open_case(wave_dataset(lat=lat, lon=lon, ntime=1))


def test_periodic_grid_longitudes_are_reported_as_the_points_lie():
    case = _open(np.arange(20.0, 80.01, 5.0), np.arange(0.0, 359.99, 5.0))
    assert "0..355 E, periodic" in repr(case)
    regional = _open(np.arange(20.0, 80.01, 5.0), np.arange(-40.0, 40.01, 5.0))
    assert "-40..40 E (" in repr(regional)


def test_domain_reaching_the_equator_is_refused_before_any_work(tmp_path, capsys):
    path = tmp_path / "equator.nc"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wave_dataset(lat=np.arange(-10.0, 60.01, 5.0), lon=np.arange(-40.0, 40.01, 5.0), ntime=1).to_netcdf(path)
    for cmd in ("invert", "batch"):
        assert main([cmd, str(path), "--quiet"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "reaches the equator" in err[0] and "--region -40,40,5,60" in err[0], err
    # the suggested cut runs
    assert main(["invert", str(path), "--quiet", "--time", "0", "--region", "-40,40,5,60"]) == 0
