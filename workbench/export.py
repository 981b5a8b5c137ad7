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

import atexit
import contextlib
import datetime as _dt
import json
import os
import re
import secrets
import signal
import socket
import stat
import threading
import time
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import xarray as xr

from workbench.errors import ExportError, WorkbenchError

__all__ = ["atomic_target", "temp_file_next_to", "clean_stale_temps", "install_exit_handlers", "export_balanced", "BALANCED_CF", "utc_now_iso", "time_tag", "package_version",
           "CAUTION", "csv_text", "read_csv"]

#: Caution line carried by every briefing output and export.
CAUTION = (
    "Diagnostic analysis of model/analysis data, not a forecast or warning. Decisions follow "
    "the official warnings of the responsible meteorological service and local procedures."
)


#: Lines of a CSV file written by the package that start with this are comments (the caution).
CSV_COMMENT = "#"


def csv_text(table, **to_csv) -> str:
    """``table.to_csv(**to_csv)`` preceded by one comment line with the caution (and the
    package version), so a table that leaves the tool carries it. Read such files back with
    :func:`read_csv` (or ``pandas.read_csv(path, comment="#")`` when no cell holds a "#")."""
    return (f"{CSV_COMMENT} PV Workbench {package_version()}: {CAUTION}\n"
            + table.to_csv(**to_csv))


def read_csv(path, **kwargs):
    """A CSV file written by :func:`csv_text` (or any CSV) as a DataFrame: the leading comment
    lines are skipped, and only those ("#" inside a cell, e.g. a piece's name, is kept)."""
    import pandas as pd

    skip = 0
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if not line.startswith(CSV_COMMENT):
                break
            skip += 1
    return pd.read_csv(path, skiprows=skip, **kwargs)


def time_tag(value) -> str:
    """A valid time as it goes into output file names: ``2051021012Z`` (to the hour, UTC)."""
    return str(np.datetime64(value, "h")).replace("-", "").replace("T", "") + "Z"


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



#: marker in the name of every temporary file the package writes: ``.<name>.pvwb-part-<host>-<pid>-<random>``
TEMP_MARK = ".pvwb-part-"
#: a temporary file not touched for this long is stale even when its pid is alive (pid reuse)
STALE_AFTER_S = 6 * 3600.0
_TEMP_RE = re.compile(r"^\..+\.pvwb-part-(?P<host>[A-Za-z0-9]*)-(?P<pid>\d+)-[a-z0-9_]+$")
#: names of the older ``mkstemp`` scheme (``.<name>.<8 random>.part``): removed once stale by age
_LEGACY_RE = re.compile(r"^\..+\.[a-z0-9_]{8}\.part$")
_LIVE_TEMPS: set[str] = set()
_LIVE_LOCK = threading.Lock()
_HANDLERS_INSTALLED = False


def _host_tag() -> str:
    return re.sub(r"[^A-Za-z0-9]", "", socket.gethostname())[:24]


def temp_path_for(path: Path) -> Path:
    """A fresh, recognisable temporary name next to ``path`` (not created)."""
    return path.parent / f".{path.name}{TEMP_MARK}{_host_tag()}-{os.getpid()}-{secrets.token_hex(4)}"


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    except OSError:
        return True
    return True


def clean_stale_temps(folder, max_age_s: float = STALE_AFTER_S) -> list[Path]:
    """Remove temporary files left in ``folder`` by killed runs; returns the removed paths.

    A ``.<name>.pvwb-part-<host>-<pid>-<random>`` file is stale when it was made on this host by
    a process that no longer exists (or by this process but is no longer being written), or when
    it has not been modified for ``max_age_s`` seconds (other hosts, reused pids). Files of the
    older ``.<name>.XXXXXXXX.part`` scheme are removed by age only. Errors are ignored: cleaning
    never stops a write.
    """
    folder = Path(folder)
    removed = []
    now = time.time()
    host = _host_tag()
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        name = entry.name
        if not name.startswith("."):
            continue
        m = _TEMP_RE.match(name)
        legacy = m is None and _LEGACY_RE.match(name) is not None
        if m is None and not legacy:
            continue
        try:
            st = entry.stat(follow_symlinks=False)
        except OSError:
            continue
        if not stat.S_ISREG(st.st_mode):
            continue
        stale = now - st.st_mtime > max_age_s
        if m is not None and not stale and m["host"] == host:
            pid = int(m["pid"])
            with _LIVE_LOCK:
                mine = entry.path in _LIVE_TEMPS or str(Path(entry.path).resolve()) in _LIVE_TEMPS
            stale = (pid == os.getpid() and not mine) or (pid != os.getpid() and not _pid_alive(pid))
        if stale:
            with contextlib.suppress(OSError):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
    return removed


def _register(tmp: Path) -> None:
    with _LIVE_LOCK:
        _LIVE_TEMPS.add(str(tmp.resolve()))


def _unregister_and_remove(tmp: Path) -> None:
    with contextlib.suppress(OSError):
        tmp.unlink()
    with _LIVE_LOCK:
        _LIVE_TEMPS.discard(str(tmp.resolve()))


def remove_live_temps() -> None:
    """Remove every temporary file this process is still writing (atexit and signal exits)."""
    with _LIVE_LOCK:
        names = list(_LIVE_TEMPS)
        _LIVE_TEMPS.clear()
    for name in names:
        with contextlib.suppress(OSError):
            os.unlink(name)


def _terminate(signum, frame):  # SIGTERM/SIGHUP -> a normal exit: finally blocks and atexit run
    raise SystemExit(128 + signum)


def install_exit_handlers() -> None:
    """Make the exits a process can see clean up its temporary files.

    atexit removes registered temporary files; SIGTERM (and SIGHUP) become ``SystemExit(128+n)``
    so ``finally`` blocks run. Signal handlers are installed only from the main thread and only
    where the default action is in place (an application's own handlers are kept). SIGINT keeps
    Python's KeyboardInterrupt, which the writers already clean up after. Idempotent.
    """
    global _HANDLERS_INSTALLED
    if _HANDLERS_INSTALLED:
        return
    _HANDLERS_INSTALLED = True
    atexit.register(remove_live_temps)
    if threading.current_thread() is not threading.main_thread():
        return
    for name in ("SIGTERM", "SIGHUP"):
        sig = getattr(signal, name, None)
        if sig is None:
            continue
        with contextlib.suppress(ValueError, OSError):
            if signal.getsignal(sig) is signal.SIG_DFL:
                signal.signal(sig, _terminate)


@contextlib.contextmanager
def temp_file_next_to(path) -> Iterator[Path]:
    """Yield a registered temporary path next to ``path`` (stale ones in the folder are cleaned
    first); it is removed when the block raises, and at exit if still there. The caller moves it
    into place (``os.replace``) inside the block."""
    path = Path(path)
    install_exit_handlers()
    clean_stale_temps(path.parent if str(path.parent) else Path("."))
    tmp = temp_path_for(path)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except OSError as exc:  # name the folder the user chose, not the temporary name
        raise type(exc)(exc.errno, exc.strerror, str(tmp.parent)) from None
    os.close(fd)
    _register(tmp)
    try:
        yield tmp
    finally:
        if tmp.exists():
            _unregister_and_remove(tmp)
        else:
            with _LIVE_LOCK:
                _LIVE_TEMPS.discard(str(tmp.resolve()))


@contextlib.contextmanager
def atomic_target(
    path, overwrite: bool = False, error: type[WorkbenchError] = ExportError, what: str = "file"
) -> Iterator[Path]:
    """Yield a temporary path to write to; on success it becomes ``path`` atomically.

    * Refuses (``error``) when ``path`` exists and ``overwrite`` is false, before
      anything is written, and again at the end if the file appeared meanwhile.
    * The temporary file ``.<name>.pvwb-part-<host>-<pid>-<random>`` is in the destination
      folder (same filesystem), is fsynced, then renamed with :func:`os.replace` (or
      hard-linked when not overwriting, which cannot clobber a file that appeared meanwhile).
    * On any exception inside the block (KeyboardInterrupt, and SIGTERM turned into SystemExit
      by :func:`install_exit_handlers`), or in the final rename, the temporary file is removed
      and the previous file (if any) is untouched; an atexit hook removes any left over.
    * Temporary files of killed runs in that folder are removed first (:func:`clean_stale_temps`).
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
    if not os.access(parent, os.W_OK | os.X_OK):
        raise error(f"folder {parent} is not writable; cannot save {what} {path.name} there")
    with temp_file_next_to(path) as tmp:
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
        _fsync_dir(parent)


# --------------------------------------------------------------------------- netCDF export

#: CF metadata of the balanced variables (standard names from the CF standard-name table
#: where one exists; anomalies have none and carry long_name only). Only the full inversion
#: keeps a standard_name; each piece's variables carry a long_name only.
BALANCED_CF: dict[str, dict[str, str]] = {
    "geopotential_anomaly": {"units": "m2 s-2", "long_name": "balanced geopotential anomaly"},
    "height_anomaly": {"units": "m", "long_name": "balanced geopotential height anomaly"},
    "u": {
        "units": "m s-1",
        "standard_name": "geostrophic_eastward_wind",
        "long_name": "balanced (geostrophic) eastward wind of the piece",
    },
    "v": {
        "units": "m s-1",
        "standard_name": "geostrophic_northward_wind",
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
    balance: str = "qg",
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
    balance : {"qg", "nonlinear"}
        Which balance made ``results`` (recorded in the ``balance`` and ``title`` global
        attributes). Nonlinear-balance winds are the nondivergent balanced winds (from the
        streamfunction), not geostrophic winds: they get no CF standard_name.

    Each piece's variable ``X`` becomes ``<piece>_X`` with its CF units, a long_name that
    says it is the part attributed to the piece (no standard_name: a partial field is not
    the analysed quantity) and a ``piece`` attribute; the full inversion (``total_X``) keeps
    its CF standard_name (the QG winds as ``geostrophic_eastward_wind`` /
    ``geostrophic_northward_wind``).
    Global attributes: Conventions, title, history, source case and checksum,
    workbench_version, export_time_utc, settings (JSON), caution, and the
    invented-case label when the case is invented.
    """
    if path is None:
        raise ExportError("export_balanced needs an output path (e.g. 'balanced.nc')")
    if balance not in ("qg", "nonlinear"):
        raise ExportError(f"balance {balance!r} is unknown; use 'qg' or 'nonlinear'")
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
            if balance == "nonlinear" and var in ("u", "v", "relative_vorticity"):
                da.attrs.pop("standard_name", None)
                da.attrs["long_name"] = da.attrs.get("long_name", var).replace(
                    "(geostrophic)", "(nondivergent, nonlinear balance)")
            da.attrs["piece"] = str(name)
            if name != "total":
                # a piece's field is a part of the balanced field, not a quantity CF names:
                # long_name only (the full inversion keeps the CF name)
                da.attrs.pop("standard_name", None)
                da.attrs["long_name"] = (f"part of the {da.attrs.get('long_name', var)} "
                                         f"attributed to the piece ({name})")
            elif "long_name" in da.attrs:
                da.attrs["long_name"] = f"{da.attrs['long_name']} (full inversion)"
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
        "title": ("Balanced fields of piecewise QG PV inversion" if balance == "qg" else
                  "Balanced fields of piecewise nonlinear-balance PV inversion (pieces of the "
                  "linearised system plus the nonlinear remainder)"),
        "balance": "QG" if balance == "qg" else "nonlinear balance",
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
