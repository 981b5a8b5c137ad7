"""Memory budget of the analysis step and of the case cache, measured with tracemalloc (bytes
allocated by Python and NumPy, not the wall clock), on synthetic grids (fixtures)."""
from __future__ import annotations

import tracemalloc
import warnings

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.analysis import analyse
from workbench.case import _Cache
from workbench.inversion.fields import balanced_fields, balanced_source

from conftest import wave_dataset

#: documented budget (DEVELOPERS.md, "Memory budget"): peak of `analyse` on one time, reference
#: state included, over the bytes of that time's input variables as stored (float32)
ANALYSE_BUDGET = 12.0


def _input_bytes(ds):
    return sum(ds[v].isel(time=0).nbytes for v in ds.data_vars if "level" in ds[v].dims)


def _grid(step, ntime):
    return wave_dataset(lat=np.arange(30.0, 60.01, step), lon=np.arange(-40.0, 40.01, step), ntime=ntime)


def _peak(fn):
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_analyse_peak_is_within_the_budget():
    ds = _grid(0.5, 1)  # 23 levels x 61 x 161, one time
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        case = wb.open_case(ds)
        peak = _peak(lambda: analyse(case))  # reference state (zonal mean of the time) included
    ratio = peak / _input_bytes(ds)
    assert 1.0 < ratio < ANALYSE_BUDGET, f"analyse peaked at {ratio:.1f}x one time's input"


def test_case_memory_over_many_times_equals_one_time():
    ds = _grid(1.0, 6)
    inp = _input_bytes(ds)

    def run(times):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            case = wb.open_case(ds)
            case.reference()  # the case-level time mean, shared by every time
            case.cache_max_bytes = 8 * inp  # about one time's derived fields

            def every_time():
                for t in times:
                    analyse(case, t)  # results dropped, as `pvwb invert` does

            return _peak(every_time), case

    one, _ = run([0])
    many, case = run(range(6))
    assert case._cache.nbytes <= 8 * inp + one  # the newest entry may go over the budget
    # the previous time's entries are dropped once the next time's are stored
    assert many <= 1.3 * one, f"6 times peaked at {many / one:.2f}x one time"


def test_cache_is_bounded_by_bytes_and_keeps_the_reference():
    c = _Cache(max_bytes=3000)
    c.get(("ref", "time_mean"), lambda: np.zeros(1000))  # pinned: not counted, never dropped
    for t in range(5):
        c.get(("at", t, None), lambda: np.zeros(200))  # 1600 bytes each
    assert ("ref", "time_mean") in c._d
    assert [k for k in c._d if k[0] == "at"] == [("at", 4, None)]  # 2 x 1600 > 3000
    assert c.nbytes == 1600
    big = c.get(("inv", 9), lambda: np.zeros(10_000))  # larger than the budget: still kept (newest)
    assert ("inv", 9) in c._d and big.size == 10_000 and ("at", 4, None) not in c._d
    # views of one buffer count once
    base = np.zeros(100)
    c2 = _Cache(max_bytes=10**6)
    c2.get(("x",), lambda: (base, base[10:], xr.DataArray(base)))
    assert c2.nbytes == 800


def test_lazy_balanced_fields_equal_the_eager_ones():
    rng = np.random.default_rng(3)
    p = np.array([1000, 850, 700, 500, 300, 200, 100.0]) * 100.0
    lat, lon = np.linspace(30, 60, 16), np.linspace(-20, 20, 21)
    phi = xr.DataArray(rng.normal(size=(2, p.size, lat.size, lon.size)) * 100.0,
                       dims=("piece", "pressure", "latitude", "longitude"),
                       coords=dict(pressure=("pressure", p, dict(units="Pa")), latitude=lat, longitude=lon))
    bt, tt = rng.normal(size=(2, lat.size, lon.size)), rng.normal(size=(lat.size, lon.size))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lazy = balanced_fields(phi, 1e-4, bottom_theta=bt, top_theta=tt)
        eager = balanced_fields(phi, 1e-4, bottom_theta=bt, top_theta=tt, lazy=False)
    assert balanced_source(lazy) is not None and balanced_source(lazy.copy(deep=True)) is None
    for name in eager.data_vars:
        np.testing.assert_array_equal(lazy[name].values, eager[name].values)
        for k in (0, 3, -1):  # one level (with the vertical halo of the temperature)
            np.testing.assert_array_equal(lazy[name].isel(pressure=k, piece=1).values,
                                          eager[name].isel(pressure=k, piece=1).values)
        np.testing.assert_array_equal(lazy[name].isel(pressure=slice(5, 1, -2)).values,
                                      eager[name].isel(pressure=slice(5, 1, -2)).values)
    with pytest.raises(KeyError):
        balanced_source(lazy).levels(["no such field"], 0, 1)
