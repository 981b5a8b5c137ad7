"""Session files: the whole workbench state as human-readable JSON.

A session file looks like::

    {
      "schema": "pv-workbench-session",
      "schema_version": 1,
      "saved_at": "2031-01-15T09:00:00Z",
      "workbench_version": "0.1.0",
      "case": {"path": "/data/storm.nc", "sha256": "9f2c...", "name": "storm"},
      ...the state's own keys (State.to_dict()): times/levels, pieces, sections,
         annotations, figure settings, target...
    }

Rules (DESIGN.md section 7):

* written atomically (temporary file in the same folder, fsync, ``os.replace``)
  and never silently overwritten (``overwrite=True`` is needed);
* read with :func:`json.loads` only: nothing in the file is executed, NaN and
  Infinity are refused, duplicate keys are refused;
* the schema name and version are checked; a file from a newer version, or
  of another kind, is refused with :class:`~workbench.errors.SessionError`;
* the case is identified by path and SHA-256 of its bytes; a case whose
  checksum differs from the recorded one is refused, naming both checksums;
* ``body_sha256`` is the SHA-256 of the whole document except that field (canonical JSON:
  keys sorted, no spaces, UTF-8); a session whose body was changed after saving, or one
  without ``body_sha256`` (written before it existed), is refused with
  :class:`SessionModifiedError` unless the user confirms (``accept_modified=True``,
  ``pvwb brief --accept-modified-session``, the page's "Load it anyway" button);
* every list and count has a cap (:data:`CAPS`), checked right after parsing and before
  any other work; the message names the cap;
* every path a session names (the case's ``path`` and ``relative_path``, a climatology
  file as ``reference``) is opened only if it lies inside the allowed folders
  (:func:`workbench.access.resolve_data_path`, the same check as the page's "open file"
  control), with one message for "not allowed" and "not found".
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from workbench.errors import AccessError, InputError, SessionError, WorkbenchError
from workbench.export import atomic_target, package_version, utc_now_iso

__all__ = [
    "FigureSettings",
    "PROJECTIONS",
    "SCHEMA",
    "SCHEMA_VERSION",
    "session_dict",
    "save_session",
    "read_session_file",
    "check_case",
    "check_caps",
    "check_body",
    "body_checksum",
    "load_session",
    "state_from_session",
    "SessionModifiedError",
    "CAPS",
]

SCHEMA = "pv-workbench-session"
SCHEMA_VERSION = 1
#: Session files larger than this are refused (a session is settings, not data).
MAX_BYTES = 32 * 1024 * 1024
#: The field holding the SHA-256 of the rest of the document.
BODY_KEY = "body_sha256"
_ENVELOPE = ("schema", "schema_version", "saved_at", "workbench_version", "case", BODY_KEY)

#: Caps on what a session may hold (checked before any expensive work; messages name them).
CAPS = {
    "pieces": 100,                # pieces in the list
    "piece_vertices": 2000,       # vertices of one piece's polygon (the lasso keeps 200)
    "annotations": 500,           # labels, arrows and regions
    "region_vertices": 2000,      # vertices of one region annotation
    "total_vertices": 200_000,    # all polygon vertices of pieces and regions together
    "sections": 50,               # section lines
    "section_points": 2000,       # npoints of one section line
    "contour_levels": 200,        # figure_settings.levels
    "string_length": 4096,        # characters in any one text (a path can be this long)
    "list_length": 2000,          # items in any other list, keys in any object
    "depth": 12,                  # nesting of lists and objects
    "values": 1_000_000,          # JSON values in the whole document
}


class SessionModifiedError(SessionError):
    """The session's body differs from what was saved (or carries no body checksum); it is
    loaded only when the user confirms (``accept_modified=True``)."""


# "native": the data's own projection (a projected model grid's; plain latitude-longitude
# otherwise), the default
PROJECTIONS = ("native", "plate_carree", "lambert_conformal", "stereographic", "mercator")
_CMAP_NAME = re.compile(r"^[A-Za-z0-9_.\-]{1,64}$")


@dataclass
class FigureSettings:
    """How the static figures look (plain data, saved in sessions as ``figure_settings``).

    ``projection``: one of :data:`PROJECTIONS`; ``width_in``/``height_in``: figure size
    (inches; maps take their height from the domain's shape); ``dpi``: PNG resolution;
    ``colour_map``: a key of ``workbench.views.static.COLOUR_MAPS`` or a matplotlib name
    (None: the field's own); ``levels``: shading levels in display units (None: automatic);
    ``contour_field``: a second map field drawn as black contours on the same surface;
    ``pv_contour``: the PV value (PVU) drawn as a thick line on PV maps (None: none);
    ``overlay_level_hpa``: level of the balanced-flow overlay when the state has none;
    ``vector_spacing``: about this many wind arrows across the map;
    ``coastlines``/``gridlines``: draw them.
    """

    projection: str = "native"
    width_in: float = 10.0
    height_in: float = 8.0
    dpi: int = 150
    colour_map: str | None = None
    levels: list | None = None
    contour_field: str | None = None
    pv_contour: float | None = 2.0
    overlay_level_hpa: float = 850.0
    vector_spacing: int = 22
    coastlines: bool = True
    gridlines: bool = True

    def __post_init__(self):
        if self.projection not in PROJECTIONS:
            raise InputError(
                f"figure projection {self.projection!r} is unknown; use one of {', '.join(PROJECTIONS)}"
            )
        for name, lo, hi in (("width_in", 3, 40), ("height_in", 2, 40), ("dpi", 30, 1200),
                             ("overlay_level_hpa", 1, 1100), ("vector_spacing", 4, 80)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not lo <= value <= hi:
                raise InputError(f"figure setting {name}={value!r} must be a number in [{lo}, {hi}]")
        self.dpi = int(self.dpi)
        self.vector_spacing = int(self.vector_spacing)
        self.width_in, self.height_in = float(self.width_in), float(self.height_in)
        self.overlay_level_hpa = float(self.overlay_level_hpa)
        if self.colour_map is not None and not (
            isinstance(self.colour_map, str) and _CMAP_NAME.match(self.colour_map)
        ):
            raise InputError(f"figure setting colour_map={self.colour_map!r} must be a colour-map name")
        if self.contour_field is not None and not (
            isinstance(self.contour_field, str) and _CMAP_NAME.match(self.contour_field)
        ):
            raise InputError(f"figure setting contour_field={self.contour_field!r} must be a field name")
        if self.levels is not None:
            if not isinstance(self.levels, (list, tuple)):
                raise InputError("figure setting levels must be a list of numbers")
            if len(self.levels) > CAPS["contour_levels"]:
                raise InputError(
                    f"figure setting levels has {len(self.levels)} contour levels; the cap "
                    f"contour_levels is {CAPS['contour_levels']}")
            try:
                lv = [float(x) for x in self.levels]
            except (TypeError, ValueError):
                raise InputError("figure setting levels must be a list of numbers") from None
            if len(lv) < 2 or any(b <= a for a, b in zip(lv, lv[1:])):
                raise InputError("figure setting levels must be at least 2 increasing numbers")
            self.levels = lv
        if self.pv_contour is not None:
            if isinstance(self.pv_contour, bool) or not isinstance(self.pv_contour, (int, float)):
                raise InputError(f"figure setting pv_contour={self.pv_contour!r} must be a number (PVU)")
            self.pv_contour = float(self.pv_contour)
        for name in ("coastlines", "gridlines"):
            if not isinstance(getattr(self, name), bool):
                raise InputError(f"figure setting {name} must be true or false")

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d) -> "FigureSettings":
        """From a dict (unknown keys refused), a FigureSettings, or None (defaults)."""
        if d is None:
            return cls()
        if isinstance(d, FigureSettings):
            return d
        if not isinstance(d, dict):
            raise InputError("figure settings must be a JSON object")
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise InputError(
                f"unknown figure setting(s) {', '.join(unknown)}; known: {', '.join(sorted(known))}"
            )
        return cls(**d)


def _case_of(state):
    case = getattr(state, "case", None)
    if case is None:
        raise SessionError("the state has no case; open a case before saving the session")
    return case


def _case_block(case, session_path: Path | None) -> dict[str, Any]:
    source = str(getattr(case, "source", "") or "<in-memory>")
    block: dict[str, Any] = {
        "path": source,
        "sha256": getattr(case, "checksum", None),
        "name": getattr(case, "name", None),
    }
    if source != "<in-memory>":
        p = Path(source).expanduser().resolve()
        block["path"] = str(p)
        if session_path is not None:
            try:
                block["relative_path"] = os.path.relpath(p, session_path.resolve().parent)
            except ValueError:  # different drives (Windows)
                pass
    return block


def session_dict(state, path=None) -> dict[str, Any]:
    """The JSON-able session document of ``state`` (envelope + ``state.to_dict()``)."""
    if not hasattr(state, "to_dict"):
        raise SessionError(
            f"cannot save a {type(state).__name__}: a session needs a workbench State "
            "(with to_dict())"
        )
    case = _case_of(state)
    body = state.to_dict()
    if not isinstance(body, dict):
        raise SessionError("State.to_dict() did not return a dict; cannot save the session")
    doc: dict[str, Any] = {
        "schema": SCHEMA,
        "schema_version": SCHEMA_VERSION,
        "saved_at": utc_now_iso(),
        "workbench_version": package_version(),
    }
    case_block = _case_block(case, Path(path) if path is not None else None)
    own_case = body.get("case")
    if isinstance(own_case, dict):  # keep whatever the state records about its case
        case_block = {**own_case, **case_block}
    doc["case"] = case_block
    for key, value in body.items():
        if key in _ENVELOPE:
            continue
        doc[key] = value
    doc[BODY_KEY] = body_checksum(doc)
    return doc


def _canonical(doc) -> bytes:
    try:
        return json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                          allow_nan=False).encode("utf-8")
    except ValueError as exc:  # NaN/inf somewhere in the state
        raise SessionError(
            f"the state holds a value JSON cannot store ({exc}); "
            "replace NaN/infinite settings before saving"
        ) from None
    except TypeError as exc:
        raise SessionError(
            f"State.to_dict() returned something that is not plain JSON ({exc}); "
            "this is a bug in the state's to_dict"
        ) from None


def body_checksum(doc: dict[str, Any]) -> str:
    """SHA-256 (hex) of the canonical JSON of ``doc`` without its ``body_sha256`` field:
    keys sorted, separators without spaces, UTF-8, numbers as Python writes them."""
    return hashlib.sha256(_canonical({k: v for k, v in doc.items() if k != BODY_KEY})).hexdigest()


def _settings_dict(value):
    if value is None or isinstance(value, dict):
        return value or None
    if hasattr(value, "to_dict"):
        return value.to_dict()
    raise SessionError(f"state.figure_settings must be a dict or FigureSettings, not {type(value).__name__}")


def save_session(state, path, overwrite: bool = False) -> Path:
    """Write ``state`` to the JSON session file ``path`` atomically; return the path.

    Refuses (SessionError) when ``path`` exists unless ``overwrite=True``; a
    failure part-way leaves any previous file intact.
    """
    path = Path(path)
    doc = session_dict(state, path)
    check_caps(doc, path)  # a session that could not be loaded back is not written
    try:
        text = json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False)
    except ValueError as exc:  # NaN/inf somewhere in the state
        raise SessionError(
            f"the state holds a value JSON cannot store ({exc}); "
            "replace NaN/infinite settings before saving"
        ) from None
    except TypeError as exc:
        raise SessionError(
            f"State.to_dict() returned something that is not plain JSON ({exc}); "
            "this is a bug in the state's to_dict"
        ) from None
    text = _compact_number_lists(text)
    with atomic_target(path, overwrite=overwrite, error=SessionError, what="session file") as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
    return path


_NUM = r"-?\d+(?:\.\d+)?(?:[eE][-+]?\d+)?|null"
_NUMBER_LIST = re.compile(r"\[\n\s*((?:%s)(?:,\n\s*(?:%s))*)\n\s*\]" % (_NUM, _NUM))


def _compact_number_lists(text: str) -> str:
    """Put lists of plain numbers (points, layers, levels) on one line.

    Only multi-line lists are touched; JSON strings cannot hold raw newlines, so
    no string content can change."""
    return _NUMBER_LIST.sub(lambda m: "[" + ", ".join(
        x.strip() for x in m.group(1).split(",")) + "]", text)


def _no_constants(name):
    raise SessionError(f"session file holds {name}, which is not valid JSON; fix or re-save it")


def _no_duplicates(pairs):
    out = {}
    for k, v in pairs:
        if k in out:
            raise SessionError(f"session file has the key {k!r} twice; remove one")
        out[k] = v
    return out


def read_session_file(path) -> dict[str, Any]:
    """Read and validate a session file's envelope; return the document (nothing executed)."""
    path = Path(path)
    if not path.is_file():
        raise SessionError(f"session file {path} not found; check the path")
    size = path.stat().st_size
    if size > MAX_BYTES:
        raise SessionError(
            f"session file {path} is {size} bytes, more than the {MAX_BYTES} a session can be; "
            "it is probably not a session file"
        )
    raw = path.read_bytes()
    # every value after the first in a list or object follows a comma: counting them (fast,
    # in C) refuses a file of millions of numbers before it is parsed
    commas = raw.count(b",")
    if commas >= CAPS["values"]:
        raise SessionError(
            f"session file {path} holds about {commas} values, over the cap values = "
            f"{CAPS['values']} (session files hold settings, not data); it is probably not a "
            "session file, or a polygon in it is far too detailed")
    try:
        doc = json.loads(
            raw.decode("utf-8"), parse_constant=_no_constants, object_pairs_hook=_no_duplicates
        )
    except UnicodeDecodeError:
        raise SessionError(f"session file {path} is not UTF-8 text; it is not a session file") from None
    except json.JSONDecodeError as exc:
        raise SessionError(
            f"session file {path} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
            f"{exc.msg}); restore it from a backup or save the session again"
        ) from None
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA:
        found = doc.get("schema") if isinstance(doc, dict) else type(doc).__name__
        raise SessionError(
            f"{path} is not a PV Workbench session (schema {found!r}, expected {SCHEMA!r})"
        )
    version = doc.get("schema_version")
    if isinstance(version, bool) or not isinstance(version, int):
        raise SessionError(f"session file {path} has no integer schema_version; it cannot be read")
    if version != SCHEMA_VERSION:
        newer = version > SCHEMA_VERSION
        raise SessionError(
            f"session file {path} has schema_version {version}; this PV Workbench "
            f"({package_version()}) reads version {SCHEMA_VERSION} only"
            + ("; update PV Workbench to open it" if newer else "; re-create the session")
        )
    case = doc.get("case")
    if not isinstance(case, dict) or not isinstance(case.get("path"), str):
        raise SessionError(f"session file {path} has no case path; it cannot be reopened")
    return doc


def check_case(doc: dict[str, Any], case, session_path=None) -> None:
    """Refuse (SessionError) a case whose checksum differs from the session's record."""
    want = doc["case"].get("sha256")
    have = getattr(case, "checksum", None)
    if want is None:
        return  # nothing recorded (an in-memory case saved without a checksum)
    if have != want:
        where = f" {session_path}" if session_path else ""
        raise SessionError(
            f"session{where} was saved with case {doc['case'].get('path')!r} of sha256 {want}, "
            f"but the case given ({getattr(case, 'source', '?')}) has sha256 {have}. "
            "Open the same case file the session was saved with, or re-save the session with "
            "this case (save_session(..., overwrite=True))"
        )


def _cap_error(where, desc, cap_name):
    return SessionError(
        f"session{where}: {desc}, over the cap {cap_name} = {CAPS[cap_name]} (session files "
        "hold settings, not data); remove some or fix the file")


def check_caps(doc: dict[str, Any], path=None) -> None:
    """Refuse (SessionError naming the cap) a session document that holds more than
    :data:`CAPS` allows. Cheap: the known lists are measured first (a million-vertex polygon
    is refused at once), then one walk over the document with a budget of values."""
    where = f" {path}" if path else ""
    if not isinstance(doc, dict):
        raise SessionError(f"session{where} must be a JSON object")

    def items(key):
        v = doc.get(key)
        return v if isinstance(v, list) else []

    pieces, anns, secs = items("pieces"), items("annotations"), items("sections")
    if len(pieces) > CAPS["pieces"]:
        raise _cap_error(where, f"{len(pieces)} pieces", "pieces")
    if len(anns) > CAPS["annotations"]:
        raise _cap_error(where, f"{len(anns)} annotations", "annotations")
    if len(secs) > CAPS["sections"]:
        raise _cap_error(where, f"{len(secs)} section lines", "sections")
    total = 0
    for group, cap_name, what in ((pieces, "piece_vertices", "piece"),
                                  (anns, "region_vertices", "region")):
        for k, item in enumerate(group):
            poly = item.get("polygon") if isinstance(item, dict) else None
            if isinstance(poly, list):
                if len(poly) > CAPS[cap_name]:
                    name = item.get("name") or item.get("label") or f"#{k + 1}"
                    raise _cap_error(where, f"{len(poly)} vertices in the polygon of {what} "
                                            f"{str(name)[:60]!r}", cap_name)
                total += len(poly)
    if total > CAPS["total_vertices"]:
        raise _cap_error(where, f"{total} polygon vertices in all", "total_vertices")
    for k, sec in enumerate(secs):
        n = sec.get("npoints") if isinstance(sec, dict) else None
        if isinstance(n, (int, float)) and not isinstance(n, bool) and \
                not 2 <= n <= CAPS["section_points"]:
            raise SessionError(
                f"session{where}: section #{k + 1} asks for {n} points; the cap "
                f"section_points allows 2 to {CAPS['section_points']}")
    fs = doc.get("figure_settings")
    levels = fs.get("levels") if isinstance(fs, dict) else None
    if isinstance(levels, list) and len(levels) > CAPS["contour_levels"]:
        raise _cap_error(where, f"{len(levels)} contour levels in figure_settings",
                         "contour_levels")
    # everything else: one walk with a budget (strings, list lengths, depth, values)
    budget = CAPS["values"]
    max_str, max_list, max_depth = CAPS["string_length"], CAPS["list_length"], CAPS["depth"]
    stack = [(doc, 1, "")]
    seen = 0
    while stack:
        obj, depth, key = stack.pop()
        seen += 1
        if seen > budget:
            raise _cap_error(where, f"more than {budget} values", "values")
        if isinstance(obj, str):
            if len(obj) > max_str:
                raise _cap_error(where, f"a text of {len(obj)} characters at "
                                        f"{key[:80] or 'the top level'}", "string_length")
        elif isinstance(obj, (list, dict)):
            if depth > max_depth:
                raise _cap_error(where, f"lists/objects nested {depth} deep at {key[:80]}",
                                 "depth")
            n = len(obj)
            if n > max_list and not (key.endswith(".polygon") or key in ("pieces",
                                                                          "annotations")):
                raise _cap_error(where, f"{n} items in {key[:80] or 'the top level'}",
                                 "list_length")
            if isinstance(obj, dict):
                for k2, v in obj.items():
                    if len(k2) > max_str:
                        raise _cap_error(where, f"a key of {len(k2)} characters",
                                         "string_length")
                    stack.append((v, depth + 1, f"{key}.{k2}" if key else k2))
            else:
                label = key if key.endswith(".polygon") else key + "[]"
                stack.extend((v, depth + 1, label) for v in obj)


def check_body(doc: dict[str, Any], path=None, accept_modified: bool = False) -> bool:
    """Compare the session's ``body_sha256`` with its body. Returns True when it matches;
    when it differs or is missing, raises :class:`SessionModifiedError` unless
    ``accept_modified`` (then returns False)."""
    where = f" {path}" if path else ""
    want = doc.get(BODY_KEY)
    have = body_checksum(doc)
    if isinstance(want, str) and want == have:
        return True
    if accept_modified:
        return False
    if want is None:
        why = (f"session{where} has no body checksum ({BODY_KEY}): it was written by an older "
               "PV Workbench or by hand")
    else:
        why = (f"session{where} was changed after it was saved (its {BODY_KEY} does not "
               "match its content)")
    raise SessionModifiedError(
        why + "; it is not loaded unless you confirm: load_session(..., accept_modified=True), "
        "pvwb brief --accept-modified-session, or “Load it anyway” in the page")


def _allowed_dirs(session_path, case, data_dirs):
    """Folders a session may read files from: ``data_dirs`` when given, else the session
    file's folder and the folder of the case file in use."""
    from workbench.access import folders

    if data_dirs is not None:
        return folders(data_dirs)
    dirs = []
    if session_path is not None:
        dirs.append(Path(session_path).expanduser().resolve().parent)
    src = getattr(case, "source", None)
    if src and str(src) != "<in-memory>":
        dirs.append(Path(str(src)).expanduser().resolve().parent)
    return folders(dirs)


def _open_recorded_case(doc, session_path: Path, data_dirs=None):
    from workbench.access import resolve_data_path

    block = doc["case"]
    recorded = block["path"]
    if recorded == "<in-memory>":
        raise SessionError(
            f"session {session_path} was saved from an in-memory case; pass case=... to "
            "load_session to say which data to use"
        )
    dirs = _allowed_dirs(session_path, None, data_dirs)
    candidates = [recorded]
    rel = block.get("relative_path")
    if isinstance(rel, str):
        candidates.append(str(session_path.expanduser().resolve().parent / rel))
    for cand in candidates:
        try:
            real = resolve_data_path(cand, dirs)
        except AccessError:
            continue
        from workbench.io import open_case

        try:
            return open_case(real)
        except WorkbenchError as exc:
            raise SessionError(f"the session's case {real} cannot be opened: {exc}") from exc
    where = ", ".join(str(d) for d in dirs) or "none"
    raise SessionError(
        f"the session's case file {recorded!r} is outside the allowed folders or not found "
        f"in them ({where}); pass case=open_case(<its path>) or data_dirs=[<its folder>] "
        "to load_session"
    )


def state_body(doc: dict[str, Any]) -> dict[str, Any]:
    """The part of a session document that ``State.from_dict`` reads (envelope removed,
    except ``case``, which is passed through as recorded)."""
    return {k: v for k, v in doc.items() if k not in _ENVELOPE or k == "case"}


def _check_reference(body, path, case, data_dirs):
    """A climatology path as ``reference`` must lie in the allowed folders; it is replaced
    by its real path (one message for "not allowed" and "not found")."""
    from workbench.access import resolve_data_path
    from workbench.state import REFERENCE_KINDS

    ref = body.get("reference")
    if ref is None or (isinstance(ref, str) and ref in REFERENCE_KINDS):
        return body
    if not isinstance(ref, str):
        raise SessionError(f"session {path}: reference must be one of "
                           f"{', '.join(REFERENCE_KINDS)} or a climatology file name")
    dirs = _allowed_dirs(path, case, data_dirs)
    try:
        real = resolve_data_path(ref, dirs, what="the session's reference climatology")
    except AccessError as exc:
        raise SessionError(f"session {path}: {exc}") from None
    return {**body, "reference": str(real)}


def state_from_session(doc: dict[str, Any], case, path=None, *, data_dirs=None,
                       accept_modified: bool = False):
    """The State of an already read session document (:func:`read_session_file`) on
    ``case``: caps, body checksum, the case's checksum and the reference path are checked,
    in that order, before the state is built."""
    check_caps(doc, path)
    check_body(doc, path, accept_modified)
    check_case(doc, case, path)
    body = _check_reference(state_body(doc), path, case, data_dirs)
    from workbench.state import State

    try:
        return State.from_dict(body, case)  # validates figure_settings too
    except WorkbenchError as exc:
        if isinstance(exc, SessionError):
            raise
        raise SessionError(f"session {path} has an invalid entry: {exc}") from exc
    except (KeyError, TypeError, ValueError) as exc:
        raise SessionError(
            f"session {path} has an invalid or missing entry ({type(exc).__name__}: {exc}); "
            "fix that entry or save the session again"
        ) from exc


def load_session(path, case=None, *, data_dirs=None, accept_modified: bool = False):
    """Read the session file ``path`` and rebuild its State.

    ``case``: the Case to use; when omitted, the case is opened from the path the session
    recorded (or from the recorded path relative to the session file), provided it lies in
    the allowed folders. Either way its SHA-256 must match the recorded one.
    ``data_dirs``: the folders the session may read files from (its case, a climatology
    ``reference``); default the session file's folder and the case file's folder.
    ``accept_modified``: load a session whose body was changed after saving (or that has no
    body checksum); otherwise :class:`SessionModifiedError`.

    Caps (:data:`CAPS`) and the body checksum are checked before the case is opened.
    """
    path = Path(path)
    doc = read_session_file(path)
    check_caps(doc, path)
    check_body(doc, path, accept_modified)
    if case is None:
        case = _open_recorded_case(doc, path, data_dirs)
    return state_from_session(doc, case, path, data_dirs=data_dirs,
                              accept_modified=accept_modified)
