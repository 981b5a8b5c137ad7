"""Exports: atomic file writing and the netCDF export of balanced fields.

:func:`atomic_target` is the one way the package writes a user's file (session,
figure, briefing PDF, netCDF): the content goes to a temporary file in the
destination folder, is flushed to disk, and only then renamed over the
destination, so a crash part-way leaves any previous file intact. An existing
file is never replaced unless ``overwrite=True``.

:func:`export_balanced` writes the balanced fields of chosen pieces (the output
of ``case.inversion`` / ``workbench.inversion.pieces.invert_pieces``) to one
CF-1.8 netCDF file with provenance attributes.
"""
from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import tempfile
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import xarray as xr

from workbench.errors import ExportError, WorkbenchError

__all__ = ["atomic_target", "export_balanced", "BALANCED_CF", "utc_now_iso", "package_version"]

#: Caution line carried by every briefing output and export.
CAUTION = (
    "Diagnostic analysis of model/analysis data, not a forecast or warning. Decisions follow "
    "the official warnings of the responsible meteorological service and local procedures."
)


def utc_now_iso() -> str:
    """The current UTC time as ISO 8601 with a trailing Z, to the second."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace(
        "+00:00", "Z"
    )


def package_version() -> str:
    """``workbench.__version__`` (or the installed distribution's version, or 'unknown')."""
    try:
        import workbench

        v = getattr(workbench, "__version__", None)
        if v:
            return str(v)
    except Exception:  # pragma: no cover - package import problems are reported elsewhere
        pass
    try:
        from importlib.metadata import version

        return version("pv-workbench")
    except Exception:
        return "unknown"


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # pragma: no cover - e.g. platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_target(
    path, overwrite: bool = False, error: type[WorkbenchError] = ExportError, what: str = "file"
) -> Iterator[Path]:
    """Yield a temporary path to write to; on success it becomes ``path`` atomically.

    * Refuses (``error``) when ``path`` exists and ``overwrite`` is false, before
      anything is written, and again at the end if the file appeared meanwhile.
    * The temporary file is in the destination folder (same filesystem), is
      fsynced, then renamed with :func:`os.replace` (or hard-linked when not
      overwriting, which cannot clobber a file that appeared meanwhile).
    * On any exception inside the block, or in the final rename, the temporary
      file is removed and the previous file (if any) is untouched.
    """
    path = Path(path).expanduser()
    if path.is_dir():
        raise error(f"{what} path {path} is a folder; give a file name")
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise error(f"folder {parent} for {what} {path.name} does not exist; create it first")
    if path.exists() and not overwrite:
        raise error(
            f"{what} {path} already exists; pass overwrite=True (or --overwrite) to replace it, "
            "or choose another name"
        )
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        yield tmp
        if not tmp.exists() or tmp.stat().st_size == 0:
            raise error(f"writing {what} {path} produced no data; nothing was saved")
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        if overwrite:
            os.replace(tmp, path)
        else:
            try:
                os.link(tmp, path)  # fails if path appeared meanwhile: never clobbers
            except FileExistsError:
                raise error(
                    f"{what} {path} appeared while it was being written; nothing was replaced. "
                    "Pass overwrite=True to replace it"
                ) from None
            except OSError:  # filesystems without hard links
                if path.exists():
                    raise error(f"{what} {path} already exists; pass overwrite=True") from None
                os.replace(tmp, path)
            else:
                tmp.unlink()
        _fsync_dir(parent)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


# --------------------------------------------------------------------------- netCDF export

#: CF metadata of the balanced variables (standard names from the CF standard-name table
#: where one exists; anomalies have none and carry long_name only).
BALANCED_CF: dict[str, dict[str, str]] = {
    "geopotential_anomaly": {"units": "m2 s-2", "long_name": "balanced geopotential anomaly"},
    "height_anomaly": {"units": "m", "long_name": "balanced geopotential height anomaly"},
    "u": {
        "units": "m s-1",
        "standard_name": "eastward_wind",
        "long_name": "balanced (geostrophic) eastward wind of the piece",
    },
    "v": {
        "units": "m s-1",
        "standard_name": "northward_wind",
        "long_name": "balanced (geostrophic) northward wind of the piece",
    },
    "relative_vorticity": {
        "units": "s-1",
        "standard_name": "atmosphere_relative_vorticity",
        "long_name": "balanced (geostrophic) relative vorticity of the piece",
    },
    "temperature_anomaly": {"units": "K", "long_name": "balanced temperature anomaly"},
    "theta_anomaly": {"units": "K", "long_name": "balanced potential temperature anomaly"},
    "omega": {
        "units": "Pa s-1",
        "standard_name": "lagrangian_tendency_of_air_pressure",
        "long_name": "QG vertical motion of the piece",
    },
}

_COORD_CF = {
    "pressure": {"standard_name": "air_pressure", "units": "Pa", "positive": "down", "axis": "Z"},
    "latitude": {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"},
    "longitude": {"standard_name": "longitude", "units": "degrees_east", "axis": "X"},
    "time": {"standard_name": "time", "axis": "T"},
}


def _safe_name(name: str) -> str:
    out = "".join(c if (c.isalnum() or c == "_") else "_" for c in str(name))
    if not out or not out[0].isalpha():
        out = "p_" + out
    return out


def _jsonable(obj):
    if hasattr(obj, "to_dict"):
        return obj.to_dict()
    if isinstance(obj, (np.generic,)):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.datetime64,)):
        return str(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON-able: {type(obj).__name__}")


def _case_provenance(case) -> dict[str, str]:
    if case is None:
        return {}
    out = {
        "source_case": str(getattr(case, "name", "")),
        "source_file": str(getattr(case, "source", "")),
        "source_sha256": str(getattr(case, "checksum", "")),
    }
    label = invented_label(case)
    if label:
        out["invented_case"] = label
    return out


def invented_label(case) -> str | None:
    """The invented-case label from the case's attributes, or None for real data.

    The sample case marks itself with an attribute ``invented`` (true/"yes") and/or
    a ``scenario``/``comment`` text; the label returned is a short human sentence.
    """
    if case is None:
        return None
    attrs = {}
    with contextlib.suppress(Exception):
        attrs = dict(getattr(case, "data").attrs)
    with contextlib.suppress(Exception):
        attrs.update(dict(getattr(case, "attrs")))
    flag = attrs.get("invented")
    text = " ".join(str(attrs.get(k, "")) for k in ("title", "comment", "scenario", "source"))
    truthy = flag is True or str(flag).strip().lower() in {"1", "true", "yes", "y"}
    if getattr(case, "invented", False) is True or truthy or "invented" in text.lower():
        extra = attrs.get("invented_label") or attrs.get("scenario")
        base = "Invented case: not real weather data."
        return f"{base} {extra}".strip() if extra and str(extra) not in base else base
    return None


def _select_results(results, pieces) -> dict[str, xr.Dataset]:
    if not isinstance(results, dict) or not results:
        raise ExportError(
            "export_balanced needs the inversion results: a dict piece name -> Dataset "
            "(from case.inversion(pieces) or invert_pieces), or a State with pieces"
        )
    if pieces is None:
        names = list(results)
    else:
        names = []
        for p in pieces:
            name = getattr(p, "name", p)
            if name not in results:
                raise ExportError(
                    f"piece {name!r} has no inversion result; available: {', '.join(results)}"
                )
            names.append(name)
    if not names:
        raise ExportError("no pieces chosen for export; name at least one piece (or 'total')")
    return {n: results[n] for n in names}


def _state_results(state, pieces):
    """(results, pieces, case, settings) from a State-like object."""
    case = getattr(state, "case", None)
    if case is None:
        raise ExportError("the state has no case; open a case before exporting")
    all_pieces = list(getattr(state, "pieces", []) or [])
    if not all_pieces:
        raise ExportError("the state has no pieces; lasso a piece before exporting")
    kwargs = {}
    for key in ("time", "member", "reference"):
        if getattr(state, key, None) is not None:
            kwargs[key] = getattr(state, key)
    results = case.inversion(all_pieces, **kwargs)
    settings = state.to_dict() if hasattr(state, "to_dict") else {}
    return results, pieces, case, settings


def export_balanced(
    results,
    pieces=None,
    path=None,
    overwrite: bool = False,
    *,
    case=None,
    settings: dict[str, Any] | None = None,
    variables=None,
) -> Path:
    """Write the balanced fields of chosen pieces to a CF-1.8 netCDF file, atomically.

    Parameters
    ----------
    results : dict or State
        ``{piece name: balanced Dataset}`` as returned by ``case.inversion`` (each
        Dataset on pressure, latitude, longitude), or a State whose pieces are
        inverted through its case.
    pieces : list of Piece or names, optional
        Which pieces to write (default all in ``results``, including ``"total"``).
    path : str or Path
        Output ``.nc`` file; refused if it exists unless ``overwrite=True``.
    case : Case, optional
        Source case for provenance (taken from the State when one is given).
    settings : dict, optional
        Settings to record (JSON) in the ``settings`` global attribute; the piece
        definitions are added under ``"pieces"`` when available.
    variables : list of str, optional
        Balanced variables to write (default every variable present).

    Each piece's variable ``X`` becomes ``<piece>_X`` with its CF units,
    standard_name (where CF has one), long_name and a ``piece`` attribute.
    Global attributes: Conventions, title, history, source case and checksum,
    workbench_version, export_time_utc, settings (JSON), caution, and the
    invented-case label when the case is invented.
    """
    if path is None:
        raise ExportError("export_balanced needs an output path (e.g. 'balanced.nc')")
    if not isinstance(results, dict):
        results, pieces, case_s, state_settings = _state_results(results, pieces)
        case = case or case_s
        settings = {**state_settings, **(settings or {})}
    chosen = _select_results(results, pieces)
    settings = dict(settings or {})
    if pieces is not None and "pieces" not in settings:
        settings["pieces"] = [p.to_dict() if hasattr(p, "to_dict") else str(p) for p in pieces]

    out = xr.Dataset()
    for name, ds in chosen.items():
        if not isinstance(ds, xr.Dataset):
            raise ExportError(f"inversion result of piece {name!r} is not an xarray Dataset")
        names = list(ds.data_vars) if variables is None else list(variables)
        for var in names:
            if var not in ds:
                raise ExportError(
                    f"variable {var!r} is not in the result of piece {name!r}; "
                    f"it has {', '.join(ds.data_vars)}"
                )
            da = ds[var].copy()
            da.attrs = {k: v for k, v in da.attrs.items() if isinstance(v, (str, int, float))}
            da.attrs.update(BALANCED_CF.get(var, {}))
            da.attrs["piece"] = str(name)
            if "long_name" in da.attrs:
                da.attrs["long_name"] = f"{da.attrs['long_name']} ({name})"
            out[f"{_safe_name(name)}_{var}"] = da
    for c, attrs in _COORD_CF.items():
        if c in out.coords:
            keep = {k: v for k, v in out[c].attrs.items() if k not in ("units",) or c != "time"}
            keep.update(attrs)
            out[c].attrs = keep
    now = utc_now_iso()
    version = package_version()
    out.attrs = {
        "Conventions": "CF-1.8",
        "title": "Balanced fields of piecewise QG PV inversion",
        "institution": "PV Workbench user",
        "source": f"PV Workbench {version} (workbench.export.export_balanced)",
        "history": f"{now} exported by PV Workbench {version}",
        "workbench_version": version,
        "export_time_utc": now,
        "pieces": ", ".join(chosen),
        "settings": json.dumps(settings, default=_jsonable, sort_keys=True),
        "caution": CAUTION,
        **_case_provenance(case),
    }
    for k, v in list(out.attrs.items()):
        if not isinstance(v, (str, int, float)):
            out.attrs[k] = str(v)
    encoding = {v: {"zlib": True, "complevel": 4} for v in out.data_vars}
    with atomic_target(path, overwrite=overwrite, error=ExportError, what="netCDF export") as tmp:
        out.load().to_netcdf(tmp, format="NETCDF4", engine="netcdf4", encoding=encoding)
    return Path(path)
