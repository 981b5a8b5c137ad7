"""Big global files: memory and time of `pvwb invert --region` on a 0.25 degree global file.

    python benchmarks/bench_region.py [--times 4] [--levels 37] [--keep PATH] [--json]

Writes (once, streamed one time and level at a time, so the writer itself stays small) an
invented 0.25 degree global netCDF file of 37 pressure levels (float32; temperature, winds,
geopotential: a standard atmosphere with a baroclinic wave, for timing only) and then runs,
each in a fresh process, ``pvwb info FILE`` and ``pvwb invert FILE --region W,E,S,N --time 0``;
it reports wall time and the peak resident memory of each process (``ru_maxrss`` of the
child), next to the size of one time of the whole file and of the region.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

LEVELS_37 = (1000, 975, 950, 925, 900, 875, 850, 825, 800, 775, 750, 700, 650, 600, 550, 500, 450, 400,
             350, 300, 250, 225, 200, 175, 150, 125, 100, 70, 50, 30, 20, 10, 7, 5, 3, 2, 1)
REGION = (-40.0, 10.0, 35.0, 70.0)


def _std_temperature(p_hpa):
    """US Standard Atmosphere 1976 temperature (K) at a pressure (troposphere, tropopause, and
    the first stratospheric layer), for the invented file's background."""
    p = np.asarray(p_hpa, float)
    t_trop = 288.15 * (p / 1013.25) ** (287.053 * 0.0065 / 9.80665)
    t = np.where(p > 226.32, t_trop, 216.65)
    upper = 216.65 * (p / 54.748) ** (-287.053 * 0.001 / 9.80665)
    return np.where(p < 54.748, upper, t)


def write_global(path, n_times=4, levels=LEVELS_37, step=0.25):
    import netCDF4

    lat = np.arange(-90.0, 90.0 + step / 2, step)
    lon = np.arange(0.0, 360.0, step)
    LAT, LON = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
    with netCDF4.Dataset(path, "w") as nc:
        nc.title = "INVENTED global test atmosphere (timing only, not weather)"
        nc.createDimension("time", n_times)
        nc.createDimension("level", len(levels))
        nc.createDimension("latitude", lat.size)
        nc.createDimension("longitude", lon.size)
        t = nc.createVariable("time", "f8", ("time",))
        t.units = "hours since 2051-02-09 00:00:00"
        t[:] = np.arange(n_times) * 6.0
        lv = nc.createVariable("level", "f4", ("level",))
        lv.units = "hPa"
        lv[:] = levels
        la = nc.createVariable("latitude", "f4", ("latitude",))
        la.units = "degrees_north"
        la[:] = lat
        lo = nc.createVariable("longitude", "f4", ("longitude",))
        lo.units = "degrees_east"
        lo[:] = lon
        spec = dict(t=("air_temperature", "K"), u=("eastward_wind", "m s-1"), v=("northward_wind", "m s-1"),
                    z=("geopotential", "m2 s-2"))
        var = {}
        for name, (std, units) in spec.items():
            v = nc.createVariable(name, "f4", ("time", "level", "latitude", "longitude"),
                                  chunksizes=(1, 1, lat.size, lon.size))
            v.standard_name, v.units = std, units
            var[name] = v
        tstd = _std_temperature(np.asarray(levels, float))
        for ti in range(n_times):
            phase = 3 * LON - 0.2 * ti
            wave = np.cos(phase) * np.cos(LAT) ** 2
            z = 0.0
            for k, p in enumerate(levels):
                # hypsometric layer thickness from the level below (R_d T / g ln(p1/p2))
                if k == 0:
                    z = 9.80665 * 111.0 + np.zeros_like(LAT)
                else:
                    z = z + 287.053 * 0.5 * (tstd[k] + tstd[k - 1]) * np.log(levels[k - 1] / p)
                amp = np.sin(np.pi * min(1.0, np.log(1000.0 / p) / np.log(1000.0 / 200.0)))
                var["t"][ti, k] = (tstd[k] - 20.0 * np.sin(LAT) ** 2 * (p > 200) + 4.0 * wave * amp).astype("f4")
                var["z"][ti, k] = (z - 600.0 * np.sin(LAT) ** 2 * np.log(1000.0 / p) + 400.0 * wave * amp).astype("f4")
                var["u"][ti, k] = (30.0 * np.sin(2 * LAT) ** 2 * amp).astype("f4")
                var["v"][ti, k] = (8.0 * np.sin(phase) * np.cos(LAT) * amp).astype("f4")
    return path


def _run(cmd):
    t0 = time.perf_counter()
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # KiB on Linux, max over children
    return out, wall, max(peak, before) / 1024.0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--times", type=int, default=4)
    ap.add_argument("--levels", type=int, default=37, choices=range(3, 38), metavar="3..37")
    ap.add_argument("--keep", default=None, help="write/reuse the global file at this path")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    levels = LEVELS_37[: args.levels]
    tmp = None
    if args.keep:
        path = Path(args.keep)
    else:
        tmp = tempfile.TemporaryDirectory()
        path = Path(tmp.name) / "global_025.nc"
    if not path.exists():
        t0 = time.perf_counter()
        write_global(path, args.times, levels)
        print(f"wrote {path} ({path.stat().st_size / 2**30:.2f} GiB) in {time.perf_counter() - t0:.0f} s",
              file=sys.stderr)
    pvwb = [sys.executable, "-m", "workbench.cli"]
    region = ",".join(f"{x:g}" for x in REGION)
    records = {}
    # each command in its own process: ru_maxrss of RUSAGE_CHILDREN is the max over children, so
    # the lighter command runs first
    for name, cmd in (("info", pvwb + ["info", str(path)]),
                      ("invert_region", pvwb + ["invert", str(path), "--region", region, "--time", "0"])):
        out, wall, peak = _run(cmd)
        if out.returncode != 0:
            print(out.stdout[-2000:], out.stderr[-2000:], file=sys.stderr)
            raise SystemExit(f"{name} failed with exit {out.returncode}")
        records[name] = dict(wall_s=round(wall, 2), peak_rss_mib=round(peak, 1))
    nlat, nlon = 721, 1440
    one_time = 4 * len(levels) * nlat * nlon * 4 / 2**20
    rlat = int((REGION[3] - REGION[2]) / 0.25) + 1
    rlon = int((REGION[1] - REGION[0]) / 0.25) + 1
    region_time = 4 * len(levels) * rlat * rlon * 8 / 2**20  # float64 in the physics
    rec = dict(file_gib=round(path.stat().st_size / 2**30, 2), times=args.times, levels=len(levels),
               one_time_float32_mib=round(one_time, 1), region=REGION, region_points=(len(levels), rlat, rlon),
               region_one_time_float64_mib=round(region_time, 1), **records)
    print(json.dumps(rec, indent=None if args.json else 2))
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
