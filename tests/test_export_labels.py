"""CF labels of the netCDF export: every standard_name written is one of the CF Standard Name
Table (version 84, from memory: cf-xarray does not ship the table and there is no internet
here), a piece's partial fields carry none, and nothing is labelled as an analysed wind."""
import xarray as xr

from workbench.export import export_balanced
from workbench.state import State

#: The CF standard names the export may use, as the CF Standard Name Table (v84) spells them
#: (from memory).
CF_TABLE_NAMES = {
    "air_pressure", "latitude", "longitude", "time", "geostrophic_eastward_wind",
    "geostrophic_northward_wind", "atmosphere_relative_vorticity", "air_temperature_anomaly",
    "geopotential_height_anomaly", "lagrangian_tendency_of_air_pressure",
}
ANALYSED = {"eastward_wind", "northward_wind", "air_temperature", "geopotential_height",
            "geopotential"}


def test_pieces_have_long_names_and_no_analysed_standard_names(small_case, tmp_path):
    state = State(small_case)
    state.add_piece(name="upper", polygon=[(-20, 38), (5, 38), (5, 55), (-20, 55)],
                    layer=(100, 500), sign=1)
    path = export_balanced(state, None, tmp_path / "balanced.nc")
    with xr.open_dataset(path) as ds:
        names = {v: ds[v].attrs.get("standard_name") for v in list(ds.data_vars) + list(ds.coords)}
        longs = {v: ds[v].attrs.get("long_name", "") for v in ds.data_vars}
    used = {n for n in names.values() if n}
    assert used <= CF_TABLE_NAMES, used - CF_TABLE_NAMES
    assert not used & ANALYSED
    pieces = [v for v in longs if not v.startswith("total_")]
    assert pieces and all(names[v] is None for v in pieces)
    assert all("attributed to the piece" in longs[v] for v in pieces)
    assert names["total_u"] == "geostrophic_eastward_wind"
