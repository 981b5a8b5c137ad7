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
    assert "0°E..355°E, periodic" in repr(case)
    regional = _open(np.arange(20.0, 80.01, 5.0), np.arange(-40.0, 40.01, 5.0))
    assert "40°W..40°E (" in repr(regional)


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


def _polar_periodic(step=5.0, ntime=2):
    """10-90N all round the globe (a fixture): the wave fixture with the winds at the pole set to
    0 (its geostrophic wind divides by cos(latitude))."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = wave_dataset(lat=np.arange(10.0, 90.01, step), lon=np.arange(0.0, 360.0 - 1e-9, step), ntime=ntime)
    pole = ds["lat"] > 89.99
    for v in ("u", "v"):
        ds[v] = ds[v].where(~pole, 0.0)
    return ds


def test_polar_periodic_grid_runs_analyse_and_brief(tmp_path):
    from pypdf import PdfReader

    from workbench.analysis import analyse

    path = tmp_path / "north.nc"
    _polar_periodic().to_netcdf(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        case = wb.open_case(path)
        _, table, target = analyse(case, 0)
    assert np.isfinite(table.loc["full inversion", "height_anomaly"])
    # the pieces add up to the full inversion (linearity of QG inversion, Davis & Emanuel 1991)
    parts = table.drop(index=["sum of pieces", "full inversion"])["height_anomaly"].sum()
    assert abs(parts - table.loc["full inversion", "height_anomaly"]) < 1e-6
    pdf = tmp_path / "north.pdf"
    assert main(["brief", str(path), "-o", str(pdf), "--quiet"]) == 0
    assert len(PdfReader(str(pdf)).pages) >= 3


def test_periodic_maps_are_closed_at_the_seam_in_every_projection():
    import cartopy.crs as ccrs

    from workbench.session import PROJECTIONS
    from workbench.views import static

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        case = wb.open_case(_polar_periodic(ntime=1))
        md = static.map_data(case, "ertel_pv", 320.0, time=0)
        figs = {p: static.draw_map(md, {"projection": p}) for p in PROJECTIONS}
    for fig in figs.values():
        fig.canvas.draw()  # the drawing itself must not fail either
    # all 360 degrees are drawn (the grid's last column is 5 degrees short of the first)
    for p in ("native", "plate_carree"):
        x0, x1, _, _ = figs[p].axes[0].get_extent(ccrs.PlateCarree())
        assert abs((x1 - x0) - 360.0) < 1e-6, (p, x0, x1)
    # a whole latitude circle is not drawn in a conic projection
    assert isinstance(figs["lambert_conformal"].axes[0].projection, ccrs.Stereographic)
    assert "polar stereographic instead of Lambert" in static.figure_text(figs["lambert_conformal"])


def test_brief_refuses_a_domain_reaching_the_equator_before_any_work(tmp_path, capsys, monkeypatch):
    import workbench.brief as brief

    path = tmp_path / "equator.nc"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wave_dataset(lat=np.arange(-10.0, 60.01, 5.0), lon=np.arange(-40.0, 40.01, 5.0), ntime=2).to_netcdf(path)
    calls = []
    monkeypatch.setattr(brief, "make_briefing", lambda *a, **k: calls.append(a))
    assert main(["brief", str(path), "-o", str(tmp_path / "b.pdf"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "reaches the equator" in err[0] and "--region -40,40,5,60" in err[0], err
    assert calls == [] and not (tmp_path / "b.pdf").exists()
