"""The shared state of a workbench session (``param`` only: no widgets, no plotting).

The :class:`State` holds what the user has chosen on top of a :class:`~workbench.case.Case`:
time and member, the map surface and field, the overlay level, the reference state, the
tropopause threshold, the pieces of a piecewise inversion, the section lines, the annotations,
the target point of the attribution table and the static figures' settings, plus a status
message and a busy flag.

Widgets change the state; views watch it (``state.param.watch``) and redraw. Everything the
state holds converts to plain JSON types with :meth:`State.to_dict` and back with
:meth:`State.from_dict` (the session files of :mod:`workbench.session` are built from these).
"""
from __future__ import annotations

import json
import re
from typing import Any

import numpy as np
import param
import xarray as xr

from .errors import InputError, PieceError, WorkbenchError
from .places import domain_label, point_label
from .sections import Section

__all__ = ["State", "PageChoices", "Section", "BOUNDARY_PIECES", "parse_surface", "surface_label", "fields_for",
           "PV_FIELDS"]

#: The boundary pieces one call away: State.add_boundary_piece(kind).
BOUNDARY_PIECES = {
    "bottom": "surface θ′",
    "top": "lid θ′",
    "lateral": "lateral boundary",
    "remainder": "remainder",
}

#: Colour-blind-safe colours for new pieces, in turn.
PIECE_COLOURS = ("#009e73", "#cc79a7", "#e69f00", "#56b4e9", "#0072b2", "#f0e442", "#000000",
                 "#d55e00")
REFERENCE_KINDS = ("time_mean", "area_mean", "zonal_mean")
_NAME_OK = re.compile(r"^[^\x00-\x1f]{1,60}$")


_PHYSICS_FIELDS = ("kind", "polygon", "layer", "layer_coord", "sign", "threshold", "rh_min")


def _physics_key(piece) -> str:
    """The fields of a piece that change its inversion (not name, visibility, colour)."""
    d = piece.to_dict()
    return json.dumps({k: d.get(k) for k in _PHYSICS_FIELDS}, sort_keys=True, default=str)


def parse_surface(value):
    """Normalise a map surface: a theta value (float, K), ``"tropopause"`` or ``"<p>hPa"``.

    Accepts numbers, ``"320"``, ``"320 K"``, ``"tropopause"`` and ``"500hPa"``/``"500 hPa"``;
    raises :class:`InputError` otherwise.
    """
    if isinstance(value, (bool, np.bool_)):
        raise InputError(f"map surface {value!r} must be a theta value in K, 'tropopause' or 'NNNhPa'")
    if isinstance(value, (int, float, np.integer, np.floating)):
        v = float(value)
        if not (150.0 <= v <= 1000.0):
            raise InputError(f"map surface theta = {v:g} K is outside 150..1000 K; pick an "
                             "isentropic surface such as 320 K")
        return v
    s = str(value).strip().lower().replace(" ", "")
    if s in ("tropopause", "dynamictropopause"):
        return "tropopause"
    if s.endswith("hpa"):
        try:
            p = float(s[:-3])
        except ValueError:
            p = None
        if p is not None and 1.0 <= p <= 1100.0:
            return f"{p:g}hPa"
    if s.endswith("k"):
        s = s[:-1]
    try:
        return parse_surface(float(s))
    except ValueError:
        raise InputError(f"map surface {value!r} is not understood: give theta in K (e.g. 320), "
                         "'tropopause' or a pressure level such as '500hPa'") from None


def surface_label(surface, threshold=2.0) -> str:
    """Human label of a surface for titles: '320 K', 'dynamic tropopause (2 PVU)', '500 hPa'."""
    if surface == "tropopause":
        return f"dynamic tropopause ({threshold:g} PVU)"
    if isinstance(surface, str) and surface.endswith("hPa"):
        return surface[:-3] + " hPa"
    return f"{float(surface):g} K"


def _figure_settings_dict(value):
    """A full, validated figure-settings dict (``session.FigureSettings`` as plain data)."""
    from .session import FigureSettings

    if value is None:
        return FigureSettings().to_dict()
    if hasattr(value, "to_dict") and not isinstance(value, dict):
        value = value.to_dict()
    return FigureSettings.from_dict(dict(value)).to_dict()


class FigureSettingsDict(param.Dict):
    """The static figures' settings: a dict of ``workbench.session.FigureSettings`` fields.

    Setting it accepts a FigureSettings, a dict of some of its fields (the others take their
    defaults) or None (all defaults); unknown keys or bad values raise InputError."""

    def __set__(self, obj, val):
        super().__set__(obj, _figure_settings_dict(val))


#: Map fields that make no sense on the dynamic tropopause (PV is the threshold there).
PV_FIELDS = ("ertel_pv", "ertel_pv_anomaly")
#: What the map shows instead when the surface becomes the dynamic tropopause with a PV field.
TROPOPAUSE_FIELD = "potential_temperature"
_PV_NAMES = {"ertel_pv": "PV", "ertel_pv_anomaly": "the PV anomaly"}


def fields_for(surface, fields) -> list:
    """The map fields of ``fields`` that can be drawn on ``surface`` (no PV on the tropopause)."""
    if surface == "tropopause":
        return [f for f in fields if f not in PV_FIELDS]
    return list(fields)


class Surface(param.Parameter):
    """A map surface parameter (validated and normalised by :func:`parse_surface`).

    On a :class:`State`, choosing the dynamic tropopause while the field is PV switches the
    field to potential temperature in the same change (watchers see one consistent pair)
    and says so in the status line."""

    def _validate(self, val):
        super()._validate(val)
        parse_surface(val)

    def __set__(self, obj, val):
        val = parse_surface(val)
        if isinstance(obj, State) and val == "tropopause" and obj.field in PV_FIELDS:
            with param.parameterized.batch_call_watchers(obj):
                old = obj.field
                obj.param.field._set_unchecked(obj, TROPOPAUSE_FIELD)
                super().__set__(obj, val)
                obj.set_status(f"PV is the threshold value everywhere on the dynamic tropopause, "
                               f"so the map shows potential temperature there instead of "
                               f"{_PV_NAMES.get(old, old)}.", "info")
            return
        super().__set__(obj, val)


class MapField(param.Selector):
    """The map field: one of the case's map fields, refused with a clear message where the
    surface cannot carry it (PV on the dynamic tropopause)."""

    def _set_unchecked(self, obj, val):
        param.Selector.__set__(self, obj, val)

    def __set__(self, obj, val):
        if isinstance(obj, State) and val in PV_FIELDS and obj.surface == "tropopause":
            raise InputError("PV is the threshold value everywhere on the dynamic tropopause; "
                             "map θ, pressure, height or wind there, or pick an isentropic "
                             "surface for PV")
        super().__set__(obj, val)


def _piece_api():
    from .inversion import pieces

    return pieces


class PageChoices(param.Parameterized):
    """What the page's controls hold between gestures (not saved in sessions): the mouse mode,
    the settings of the next lasso, the annotation text and colour, the last click, and the
    folders the page may read from and write to. Lives at ``State.page`` so that every panel
    needs only the State."""

    rebuilds = param.Integer(default=0, doc="Counts the panels rebuilt with new figures (a new "
                                            "case or map projection); the page then drops the "
                                            "old figures from the browser's model index.")
    map_projection = param.Selector(default="native", objects=["native", "lonlat"],
                                    doc="Draw the map in the data's own projection (when the "
                                        "case has one) or on longitude-latitude.")
    mouse_mode = param.Selector(default="lasso", objects=["pan", "lasso", "section", "target",
                                                          "label", "edit", "move", "arrow"],
                                doc="What a drag or click on the map does ('edit': drag the "
                                    "vertices of piece outlines; 'move': drag labels; 'arrow': "
                                    "drag an arrow).")
    lasso_follow = param.Boolean(default=False,
                                 doc="The next lasso piece follows its anomaly at other times.")
    selected = param.String(default=None, allow_None=True,
                            doc="What Delete removes: 'piece:NAME' or 'annotation:ID'.")
    play_fps = param.Number(default=1.0, bounds=(0.1, 10.0), doc="Frames per second of the time loop.")
    lasso_makes = param.Selector(default="interior", objects=["interior", "bottom", "top",
                                                              "region"],
                                 doc="A lasso makes an interior PV piece, a surface/lid θ′ "
                                     "piece or a highlighted region (annotation).")
    layer_coord = param.Selector(default="pressure", objects=["pressure", "theta"])
    layer = param.NumericTuple(default=None, length=2, allow_None=True,
                               doc="Layer of the next interior piece (hPa or K); None: all.")
    sign = param.Selector(default=1, objects=[1, -1, 0],
                          doc="Sign of the next piece's anomaly: 1 positive, -1 negative, 0 both.")
    min_anomaly = param.Number(default=0.0, bounds=(0.0, None),
                               doc="Minimum |PV anomaly| (PVU) of the next interior piece.")
    rh_min = param.Number(default=None, allow_None=True, bounds=(0.0, 100.0),
                          doc="Moist only: minimum relative humidity (%), None: any.")
    piece_name = param.String(default="", doc="Name of the next piece (blank: automatic).")
    label_text = param.String(default="", doc="Text of the next label / region label.")
    label_colour = param.String(default="black", doc="Colour of the next annotation.")
    last_click = param.NumericTuple(default=None, length=2, allow_None=True,
                                    doc="(lon, lat) of the last click on the map.")
    data_dirs = param.List(default=[], doc="Folders the page may open files from.")
    output_dir = param.String(default=None, allow_None=True,
                              doc="The folder sessions and exports are written to.")


class _OverlayNumber(param.Parameter):
    """An optional number of the balanced-flow overlay (None: automatic); a value outside
    ``low..high`` (or not a number) raises InputError naming the setting."""

    __slots__ = ["low", "high", "integer", "what"]

    def __init__(self, low, high, integer=False, what="value", **kw):
        super().__init__(**kw)
        self.low, self.high, self.integer, self.what = low, high, integer, what

    def __set__(self, obj, val):
        if val is not None:
            ok = isinstance(val, (int, float, np.integer, np.floating)) and \
                not isinstance(val, (bool, np.bool_)) and np.isfinite(val)
            if ok and self.integer and float(val) != int(val):
                ok = False
            if not ok or not (self.low <= float(val) <= self.high):
                kind = "a whole number" if self.integer else "a number"
                raise InputError(f"{self.what} {val!r} must be {kind} from {self.low:g} to "
                                 f"{self.high:g} (or None for automatic)")
            val = int(val) if self.integer else float(val)
        super().__set__(obj, val)


class _PieceNames(param.List):
    """Names of existing pieces (InputError for anything else)."""

    def __set__(self, obj, val):
        val = [] if val is None else val
        if not isinstance(val, (list, tuple)) or not all(isinstance(n, str) for n in val):
            raise InputError(f"overlay pieces left out {val!r} must be a list of piece names")
        if isinstance(obj, State) and obj.pieces is not None:
            known = {p.name for p in obj.pieces}
            bad = [n for n in val if n not in known]
            if bad:
                raise InputError(f"no piece called {', '.join(map(repr, bad))}; pieces: "
                                 f"{', '.join(sorted(known)) or 'none yet'}")
        super().__set__(obj, list(dict.fromkeys(val)))


class State(param.Parameterized):
    """What the user has chosen on a case; the shared model of the views and the app.

    All settings are ``param`` parameters, so widgets can be generated from them and views
    can watch them. Pieces are :class:`workbench.inversion.pieces.Piece` objects; sections
    are :class:`workbench.sections.Section`; annotations come from
    :mod:`workbench.annotations`.
    """

    case = param.Parameter(default=None, doc="The workbench.Case being diagnosed.")
    time_index = param.Integer(default=0, bounds=(0, None), doc="Index into case.times.")
    member = param.Integer(default=None, allow_None=True, bounds=(0, None),
                           doc="Ensemble member index (None when the case has no members).")
    surface = Surface(default=320.0, doc="Map surface: theta (K), 'tropopause' or 'NNNhPa'.")
    field = MapField(default="ertel_pv", objects=["ertel_pv", "ertel_pv_anomaly",
                           "potential_temperature", "pressure", "wind_speed",
                           "geopotential_height", "u", "v"], doc="Map field (case.MAP_FIELDS).")
    overlay_level = param.Number(default=850.0, bounds=(1.0, 1100.0),
                                 doc="Pressure level (hPa) of the balanced-flow overlay.")
    reference = param.String(default=None, allow_None=True,
                             doc="Reference state: time_mean, area_mean, zonal_mean or a "
                                 "climatology file path; None takes the case's default_reference.")
    threshold = param.Number(default=2.0, bounds=(0.5, 10.0),
                             doc="Dynamic-tropopause PV threshold (PVU).")
    pieces = param.List(default=[], doc="Pieces of the piecewise inversion.")
    sections = param.List(default=[], item_type=Section, doc="Section lines.")
    active_section = param.Integer(default=None, allow_None=True,
                                   doc="Index of the section shown (None: none).")
    annotations = param.List(default=[], doc="Labels, arrows and regions (workbench.annotations).")
    target = param.NumericTuple(default=None, length=3, allow_None=True,
                                doc="Attribution target point (lon, lat, pressure hPa).")
    figure_settings = FigureSettingsDict(
        default=None, allow_None=True,
        doc="How the static figures look (projection, size, dpi, colours...): the fields of "
            "workbench.session.FigureSettings as a dict; None or missing keys take the defaults.")
    # --- balanced-flow overlay on the map (saved in sessions as "overlay") ---
    overlay_contour_interval = _OverlayNumber(
        0.1, 10000.0, what="contour interval of the balanced height anomaly (m)",
        default=None, allow_None=True,
        doc="Interval (m) of the balanced height-anomaly contours; None: about 5 contours.")
    overlay_arrow_stride = _OverlayNumber(
        1, 100, integer=True, what="arrow density (an arrow every n grid points)",
        default=None, allow_None=True,
        doc="A balanced-flow arrow at every n-th grid point; None: about 18 across the map.")
    overlay_arrow_speed = _OverlayNumber(
        0.1, 1000.0, what="arrow scale (m/s per arrow spacing)", default=None,
        allow_None=True,
        doc="Speed (m/s) of an arrow one spacing long, drawn as the legend arrow; None: "
            "the largest speed rounded to a nice number.")
    overlay_left_out = _PieceNames(
        default=[], doc="Visible pieces left out of the map's overlay (names).")
    status = param.String(default="", doc="Status message for the user.")
    status_level = param.Selector(default="info", objects=["info", "success", "warning", "error"])
    busy = param.Boolean(default=False, doc="True while a computation runs.")
    page = param.ClassSelector(class_=PageChoices, default=None, allow_None=True,
                               doc="The page's control settings (PageChoices; not saved).")
    undo_steps = param.Integer(default=0, bounds=(0, None), precedence=-1,
                               doc="How many changes undo can take back (read only).")
    redo_steps = param.Integer(default=0, bounds=(0, None), precedence=-1,
                               doc="How many undone changes redo can bring back (read only).")
    # --- balance of the attribution, briefing fields, last what-if (saved in sessions) ---
    balance = param.Selector(default="qg", objects=["qg", "nonlinear"],
                             doc="Balance of the attribution table and overlay: 'qg' (the instant "
                                 "preview) or 'nonlinear' (refined in the background).")
    balance_floor = param.Boolean(default=False, doc="Nonlinear balance: accept the floor remedy "
                                                     "where PV or absolute vorticity has the wrong sign.")
    briefing = param.Dict(default={}, doc="Briefing fields: headline, summary, author, office, "
                                          "pages (names of brief.PAGES in order; None: default).")
    whatif = param.Dict(default=None, allow_None=True,
                        doc="The last what-if run: its settings and a summary of its results.")

    def __init__(self, case=None, **params):
        params["figure_settings"] = _figure_settings_dict(params.get("figure_settings"))
        params.setdefault("page", PageChoices())
        super().__init__(case=case, **params)
        if case is not None:
            self._fit_to_case()
        self._history_init()

    # ------------------------------------------------------------------ case and selection
    def _fit_to_case(self):
        case = self.case
        self.param.time_index.bounds = (0, max(0, len(case.times) - 1))
        if self.time_index >= len(case.times):
            self.time_index = 0
        if case.members is None:
            self.member = None
        elif self.member is None:
            self.member = 0
        if self.reference is None or (self.reference == "time_mean" and len(case.times) < 2):
            self.reference = getattr(case, "default_reference", "time_mean")
        fields = list(getattr(case, "MAP_FIELDS", self.param.field.objects))
        self.param.field.objects = fields
        levels = [float(x) for x in case.levels_hpa]
        if not any(abs(self.overlay_level - p) < 0.5 for p in levels):
            self.overlay_level = min(levels, key=lambda p: abs(p - 850.0))

    def set_case(self, case):
        """Switch to another case: pieces, sections and target are cleared (they belong to
        the old grid); settings that still apply are kept."""
        with param.parameterized.batch_call_watchers(self):
            self.pieces = []
            self.sections = []
            self.active_section = None
            self.target = None
            self.annotations = []
            self.case = case
            self._fit_to_case()

    @property
    def time(self):
        """The selected time index (what ``case.at(time=...)`` takes)."""
        return self.time_index

    @property
    def valid_time(self):
        """The selected time as numpy datetime64."""
        return self.case.times[self.time_index]

    @property
    def time_labels(self):
        return [str(t)[:16].replace("T", " ") + " UTC" for t in self.case.times]

    def _sel(self):
        return dict(time=self.time_index, member=self.member)

    # ------------------------------------------------------------------ status
    def set_status(self, message, level="info"):
        """Show ``message`` in the status area (level: info, success, warning, error)."""
        self.status_level = level
        self.status = str(message)

    def report(self, exc):
        """Show an exception in the status area (WorkbenchError messages verbatim)."""
        if isinstance(exc, WorkbenchError):
            self.set_status(str(exc), "error")
        else:
            self.set_status(f"Unexpected {type(exc).__name__}: {exc}", "error")

    # ------------------------------------------------------------------ map fields
    def available_fields(self, surface=None) -> list:
        """The map fields the (given or current) surface can carry."""
        return fields_for(self.surface if surface is None else surface,
                          self.param.field.objects)

    def map_field(self):
        """The 2-D field of the map (read from the case; cached there)."""
        return self.case.map_field(self.field, self.surface, reference=self.reference,
                                   threshold=self.threshold, **self._sel())

    # ------------------------------------------------------------------ pieces
    @property
    def piece_names(self):
        return [p.name for p in self.pieces]

    def piece(self, name):
        """The piece called ``name`` (PieceError if there is none)."""
        for p in self.pieces:
            if p.name == name:
                return p
        raise PieceError(f"there is no piece called {name!r}; pieces: "
                         f"{', '.join(self.piece_names) or 'none yet'}")

    def new_piece_name(self, base="piece"):
        """``base`` if unused, else ``base 2``, ``base 3``..."""
        names = set(self.piece_names)
        if base not in names:
            return base
        k = 2
        while f"{base} {k}" in names:
            k += 1
        return f"{base} {k}"

    def _next_colour(self):
        used = {getattr(p, "colour", None) for p in self.pieces}
        for c in PIECE_COLOURS:
            if c not in used:
                return c
        return PIECE_COLOURS[len(self.pieces) % len(PIECE_COLOURS)]

    def _check_name(self, name, exclude=None, kind=None):
        if not isinstance(name, str) or not _NAME_OK.match(name) or not name.strip():
            raise PieceError(f"piece name {name!r} must be 1-60 printable characters")
        if name == "total":
            raise PieceError("'total' is the full inversion; give the piece another name")
        if name == "remainder" and kind != "remainder":
            raise PieceError("'remainder' is kept for the remainder piece; give the piece another name")
        if name in self.piece_names and name != exclude:
            raise PieceError(f"a piece called {name!r} exists already; pick another name")

    def add_piece(self, piece=None, **kwargs):
        """Add a Piece (or build one from keyword arguments of ``Piece``); returns it.

        A missing name becomes ``piece``, ``piece 2``...; a missing colour is the next of a
        colour-blind-safe set. Names must be unique and not ``total``.
        """
        api = _piece_api()
        if piece is None:
            kwargs.setdefault("name", self.new_piece_name())
            kwargs.setdefault("colour", self._next_colour())
            piece = api.Piece(**kwargs)
        elif kwargs:
            raise PieceError("give either a Piece or keyword arguments for a new one, not both")
        elif isinstance(piece, dict):
            piece = api.Piece.from_dict(piece)
        self._check_name(piece.name, kind=piece.kind)
        if piece.kind == "remainder" and any(p.kind == "remainder" for p in self.pieces):
            raise PieceError("there is a remainder piece already; only one is allowed")
        self.pieces = list(self.pieces) + [piece]
        return piece

    def add_boundary_piece(self, kind):
        """Add the boundary piece ``kind`` ("bottom", "top", "lateral" or "remainder")."""
        if kind not in BOUNDARY_PIECES:
            raise PieceError(f"boundary piece {kind!r} is unknown; use one of "
                             f"{', '.join(BOUNDARY_PIECES)}")
        for p in self.pieces:
            if p.kind == kind and p.polygon is None:
                raise PieceError(f"the {BOUNDARY_PIECES[kind]} piece exists already "
                                 f"(called {p.name!r})")
        return self.add_piece(name=self.new_piece_name(BOUNDARY_PIECES[kind]), kind=kind)

    def _replace(self, target, **changes):
        api = _piece_api()
        new = []
        for p in self.pieces:
            if p.name == target:
                d = p.to_dict()
                d.update(changes)
                p = api.Piece.from_dict(d)
            new.append(p)
        self.pieces = new

    def remove_piece(self, name):
        """Delete the piece ``name``."""
        self.piece(name)
        self.pieces = [p for p in self.pieces if p.name != name]

    def rename_piece(self, old, new):
        """Rename a piece (unique, not 'total')."""
        self.piece(old)
        new = str(new).strip()
        if new == old:
            return
        self._check_name(new, exclude=old, kind=self.piece(old).kind)
        self._replace(old, name=new)

    def toggle_piece(self, name, visible=None):
        """Show/hide a piece's balanced flow on the map (``visible`` None flips it)."""
        p = self.piece(name)
        vis = (not p.visible) if visible is None else bool(visible)
        self._replace(name, visible=vis)

    # ------------------------------------------------------------------ inversion
    def results(self):
        """Balanced fields of every piece, the remainder and ``"total"`` (dict name ->
        Dataset, in the order of ``invert_pieces``). Empty dict when there are no pieces.

        The first call (and any change other than appending or dropping pieces at the end of
        the list) runs ``case.inversion`` (cached in the case). Appending a piece, as a lasso
        does, inverts only the new piece: pieces claim their forcing in list order, so the
        earlier pieces' results stay as they are, the new piece gets the part of its forcing
        that no earlier piece claimed, and by linearity the remainder loses exactly the new
        piece's balanced fields. Dropping pieces from the end adds them back to the remainder.
        Renaming, recolouring and showing/hiding reuse the results. The tests check this
        bookkeeping against a full ``invert_pieces`` of the same list.
        """
        if not self.pieces:
            return {}
        pieces = self.pieces_now()
        key = (self.time_index, self.member, self.reference)
        pk = [_physics_key(p) for p in pieces]
        c = self.__dict__.get("_inc")
        if c is not None and c["key"] == key:
            old = c["pk"]
            if pk == old:
                c["pieces"] = pieces
                return self._named(c)
            n = len(old)
            if len(pk) > n and pk[:n] == old and all(
                    p.kind != "remainder" for p in pieces[n:]):
                for piece in pieces[n:]:
                    self._append_result(c, piece)
                c["pk"], c["pieces"] = pk, pieces
                return self._named(c)
            if len(pk) < n and old[:len(pk)] == pk and all(
                    json.loads(k)["kind"] != "remainder" for k in old[len(pk):]):
                c["pieces"] = pieces
                self._drop_results(c, len(pk))
                c["pk"] = pk
                return self._named(c)
        res = self.case.inversion(list(pieces), reference=self.reference, **self._sel())
        rem_name = next((p.name for p in pieces if p.kind == "remainder"), "remainder")
        c = dict(key=key, pk=pk, total=res["total"], remainder=res[rem_name], pieces=pieces,
                 by_index=[None if p.kind == "remainder" else res[p.name] for p in pieces])
        self._claims(c, pieces)
        self.__dict__["_inc"] = c
        return res

    def warm(self):
        """Prepare the inversion of the selected time (anomaly, solver, full inversion) so
        that the first lasso is as fast as the others."""
        key = (self.time_index, self.member, self.reference)
        c = self.__dict__.get("_inc")
        if c is not None and c["key"] == key:
            return
        res = self.case.inversion([], reference=self.reference, **self._sel())
        c = dict(key=key, pk=[], total=res["total"], remainder=res["remainder"], by_index=[],
                 pieces=[])
        self._claims(c, [])
        self.__dict__["_inc"] = c

    def _named(self, c):
        out = {}
        rem_name = "remainder"
        for p, r in zip(c.get("pieces", self.pieces), c["by_index"]):
            if p.kind == "remainder":
                rem_name = p.name
            else:
                out[p.name] = r
        out[rem_name] = c["remainder"]
        out["total"] = c["total"]
        return out

    def _anomaly(self):
        return self.case.anomaly(reference=self.reference, **self._sel())

    def _claims(self, c, pieces):
        """Record what the pieces claim, in list order (first claim wins)."""
        from .inversion.pieces import Claims

        claims = Claims(self._anomaly())
        for p in pieces:
            if p.kind != "remainder":
                claims.take(p)
        c["claims"] = claims

    def _append_result(self, c, piece):
        from .inversion.fields import invert_qgpv

        anom = self._anomaly()
        f = c["claims"].take(piece)  # points an earlier piece claimed stay with it
        zero2 = np.zeros_like(c["claims"].bt)
        q = np.zeros_like(c["claims"].q) if f["q"] is None else f["q"]
        bt = zero2 if f["bottom_theta"] is None else f["bottom_theta"]
        tt = zero2 if f["top_theta"] is None else f["top_theta"]
        qda = anom["qgpv_anomaly"].transpose("pressure", "latitude", "longitude")
        res = invert_qgpv(qda.copy(data=q), sigma=anom["static_stability"],
                          f0=anom.attrs.get("f0"), bottom_theta=bt, top_theta=tt,
                          lateral_geopotential=None if f["lateral"] is None else
                          qda.copy(data=f["lateral"]))
        res.attrs = dict(c["total"].attrs, piece=piece.name, kind=piece.kind)
        with xr.set_options(keep_attrs=True):
            rem = c["remainder"] - res
        rem.attrs = dict(c["remainder"].attrs)
        c["remainder"] = rem
        c["by_index"] = list(c["by_index"]) + [res]

    def _drop_results(self, c, keep):
        dropped = c["by_index"][keep:]
        rem = c["remainder"]
        with xr.set_options(keep_attrs=True):
            for r in dropped:
                rem = rem + r
        rem.attrs = dict(c["remainder"].attrs)
        c["remainder"] = rem
        c["by_index"] = c["by_index"][:keep]
        self._claims(c, c.get("pieces", self.pieces))

    def visible_results(self):
        """Results of the visible pieces only (no 'total'; nonlinear once refined)."""
        res = self.balanced_results()[0]
        return {p.name: res[p.name] for p in self.pieces if p.visible and p.name in res}

    def overlay(self):
        """The balanced flow drawn over the map: the sum of the visible pieces' balanced
        ``u``, ``v`` and ``height_anomaly`` at the overlay level (pieces add linearly),
        a Dataset (latitude, longitude) with attrs ``pieces`` (names) and ``level_hpa``;
        None when no piece is visible. Pieces named in ``overlay_left_out`` are left out."""
        vis = self.visible_results()
        vis = {n: r for n, r in vis.items() if n not in self.overlay_left_out}
        if not vis:
            return None
        names = list(vis)
        first = vis[names[0]]
        p = first["pressure"].values
        k = int(np.argmin(np.abs(p - self.overlay_level * 100.0)))
        sums = {}
        for var in ("u", "v", "height_anomaly"):
            sums[var] = sum(np.asarray(vis[n][var].transpose("pressure", "latitude",
                                                               "longitude").values[k])
                            for n in names)
        coords = {"latitude": first["latitude"], "longitude": first["longitude"]}
        total = xr.Dataset({v: (("latitude", "longitude"), a, dict(first[v].attrs))
                            for v, a in sums.items()}, coords=coords)
        total.attrs = dict(pieces=names, level_hpa=float(p[k]) / 100.0)
        return total

    # ------------------------------------------------------------------ map read-outs
    def overlay_readout(self):
        """:meth:`overlay` plus the summed balanced wind's ``wind_speed`` (m s-1) and
        ``wind_from_direction`` (degrees, meteorological: where the wind blows from),
        computed with MetPy's ``wind_speed`` / ``wind_direction``; None without an overlay."""
        ov = self.overlay()
        if ov is None:
            return None
        from metpy.calc import wind_direction, wind_speed

        from .units import units

        u = np.asarray(ov["u"].values, float) * units("m/s")
        v = np.asarray(ov["v"].values, float) * units("m/s")
        dims = ("latitude", "longitude")
        ov["wind_speed"] = (dims, np.asarray(wind_speed(u, v).m_as("m/s")),
                            dict(units="m s-1", long_name="balanced wind speed"))
        ov["wind_from_direction"] = (dims, np.asarray(
            wind_direction(u, v, convention="from").m_as("degree")),
            dict(units="degree", standard_name="wind_from_direction"))
        return ov

    def map_point_field(self):
        """The second quantity of the map read-out on the map's grid: the pressure (Pa) of
        the surface on an isentropic surface or the dynamic tropopause, the potential
        temperature (K) on a pressure level; attrs ``label`` and ``units``."""
        on_level = isinstance(self.surface, str) and self.surface.endswith("hPa")
        name = "potential_temperature" if on_level else "pressure"
        da = self.case.map_field(name, self.surface, reference=self.reference,
                                 threshold=self.threshold, **self._sel())
        da = da.copy(deep=False)  # (the case caches its maps: attrs of a copy)
        da.attrs = dict(da.attrs, label="θ" if on_level else "pressure",
                        units="K" if on_level else "Pa")
        return da

    def map_field_difference(self, other):
        """This state's map field minus ``other``'s (same case, field and surface; e.g. the
        compare view's B − A), a DataArray with attrs ``field``, ``surface`` and
        ``difference``."""
        if other.case is not self.case:
            raise InputError("a difference map needs both maps on the same case")
        if other.field != self.field or other.surface != self.surface:
            raise InputError("a difference map needs the same field and surface on both maps")
        a, b = other.map_field(), self.map_field()
        with xr.set_options(keep_attrs=True):
            out = b - a
        out.attrs = dict(b.attrs, difference=f"{self._label()} − {other._label()}")
        return out

    def _label(self):
        t = str(self.valid_time)[:13].replace("T", " ") + " UTC"
        return t + ("" if self.member is None else f" member {self.member}")

    def attribution(self, target=None):
        """Each piece's share at the target point (lon, lat, pressure hPa), a pandas DataFrame
        from ``workbench.inversion.pieces.attribution`` (pieces plus their sum and the total)."""
        target = self.target if target is None else target
        if target is None:
            raise InputError("no target point set; click a point on the map first")
        lon, lat, p = (float(x) for x in target)
        res = self.results()
        if not res:
            raise PieceError("there are no pieces yet; lasso an anomaly or add a boundary piece")
        return _piece_api().attribution(res, lon, lat, p)

    def set_target(self, lon, lat, pressure_hpa=None):
        """Set the attribution target (pressure defaults to the overlay level)."""
        d = self.case.domain
        lon, lat = float(lon), float(lat)
        if not (d["lat_min"] <= lat <= d["lat_max"] and d["lon_min"] <= lon <= d["lon_max"]):
            raise InputError(f"target point ({point_label(lon, lat, 2)}) is outside the case domain "
                             f"({domain_label(d)}); click inside the map")
        p = self.overlay_level if pressure_hpa is None else float(pressure_hpa)
        self.target = (lon, lat, p)

    # ------------------------------------------------------------------ sections
    def add_section(self, start, end, name=None, npoints=100):
        """Add a section line (start/end as (lon, lat)) and make it the active one."""
        sec = Section((float(start[0]), float(start[1])), (float(end[0]), float(end[1])),
                      name or f"section {len(self.sections) + 1}", int(npoints))
        with param.parameterized.batch_call_watchers(self):
            self.sections = list(self.sections) + [sec]
            self.active_section = len(self.sections) - 1
        return sec

    def remove_section(self, index):
        secs = list(self.sections)
        if not 0 <= index < len(secs):
            raise InputError(f"section index {index} is out of range (0..{len(secs) - 1})")
        del secs[index]
        with param.parameterized.batch_call_watchers(self):
            self.sections = secs
            self.active_section = (len(secs) - 1) if secs else None

    def section(self, index=None, with_pieces=True):
        """The cross-section Dataset of section ``index`` (default the active one), with the
        visible pieces' balanced flow and QG omega when there are pieces."""
        from .sections import cross_section

        index = self.active_section if index is None else index
        if index is None or not self.sections:
            raise InputError("no section line yet; draw one on the map")
        sec = self.sections[index]
        results = self.visible_results() if with_pieces else None
        omega = self.omega(list(results)) if results else None
        return cross_section(self.case, sec.start, sec.end, npoints=sec.npoints,
                             results=results or None, omega=omega, threshold=self.threshold,
                             **self._sel())

    def omega(self, names=None):
        """QG omega (Pa s-1) on (pressure, latitude, longitude): a dict with the full flow's
        omega under ``"full flow"`` and, for each named piece (default: the visible ones),
        the omega attributable to it (``workbench.inversion.omega.piece_omega``: total omega
        minus the omega without the piece; these do not add up, Q is bilinear)."""
        from .inversion import omega as om

        res = self.results()
        if names is None:
            names = [p.name for p in self.pieces if p.visible and p.name in res]
        key = (self.time_index, self.member, self.reference, self._pieces_key(), tuple(names))
        cache = self.__dict__.setdefault("_omega_cache", {})
        if key in cache:
            return cache[key]
        sigma = self.case.sigma(self.reference)
        f0 = self.case.f0
        anom = self.case.anomaly(reference=self.reference, **self._sel())
        # the full geopotential with below-ground points taken from the reference
        full = (self.case.reference(self.reference)["geopotential"]
                + anom["geopotential_anomaly"]).transpose("pressure", "latitude", "longitude")
        out = {"full flow": om.qg_omega(full, sigma, f0)}
        for n in names:
            out[n] = om.piece_omega(full, res[n]["geopotential_anomaly"], sigma, f0)
        if len(cache) > 16:
            cache.clear()
        cache[key] = out
        return out

    def _pieces_key(self):
        return json.dumps([p.to_dict() for p in self.pieces], sort_keys=True, default=str)

    # ------------------------------------------------------------------ annotations
    def add_annotation(self, annotation):
        """Add a Label, Arrow, Region (or Section*) annotation, or its dict; returns it."""
        from .annotations import annotation_from_dict, annotations_from_list

        if isinstance(annotation, dict):
            annotation = annotation_from_dict(annotation)
        self.annotations = annotations_from_list(list(self.annotations) + [annotation])
        return annotation

    def remove_annotation(self, which=-1):
        """Delete one annotation: by position (default the last one added) or by its id;
        returns it. InputError when there is none."""
        items = list(self.annotations)
        if not items:
            raise InputError("there are no annotations to delete")
        if isinstance(which, str):
            idx = [k for k, a in enumerate(items) if a.id == which]
            if not idx:
                raise InputError(f"there is no annotation with id {which!r}")
            k = idx[0]
        else:
            k = int(which)
            if not -len(items) <= k < len(items):
                raise InputError(f"annotation index {k} is out of range (there are "
                                 f"{len(items)})")
        gone = items.pop(k)
        self.annotations = items
        return gone

    def clear_annotations(self):
        """Delete every annotation; returns how many there were."""
        n = len(self.annotations)
        self.annotations = []
        return n

    # ------------------------------------------------------------------ pieces that follow the weather
    # (a piece with follow="anomaly" is carried to the selected time by workbench.tracking; the
    # tracks are cached per piece, so a lasso or a time step does not track the others again)
    def set_follow(self, name, follow):
        """Carry piece ``name`` to the other times fixed in place (``"fixed"``) or following its
        anomaly (``"anomaly"``; its outline counts as drawn at the selected time unless it has a
        ``follow_from`` already)."""
        p = self.piece(name)
        if follow == p.follow:
            return
        changes = dict(follow=follow)
        if follow == "anomaly" and p.follow_from is None and self.case is not None:
            changes["follow_from"] = str(self.valid_time)[:19]
        self._replace(name, **changes)

    def _track_steps(self, piece):
        """The tracking steps of ``piece`` over the case's times (cached by its outline,
        settings, member and reference)."""
        from .tracking import track_pieces

        key = (json.dumps(piece.to_dict(), sort_keys=True, default=str), self.member, self.reference)
        cache = self.__dict__.setdefault("_tracks", {})
        if key not in cache:
            if len(cache) > 32:
                cache.clear()
            cache[key] = track_pieces(self.case, [piece], member=self.member,
                                      reference=self.reference,
                                      time=piece.follow_from or str(self.valid_time)[:19])[piece.name]
        return cache[key]

    def _piece_now(self, piece):
        """(piece at the selected time or None when lost, status, note)."""
        if piece.follow != "anomaly" or self.case is None:
            return piece, "fixed", ""
        start = piece.follow_from
        if start is None or str(start)[:19] == str(self.valid_time)[:19]:
            return piece, "start", ""
        steps = self._track_steps(piece)
        s = next((s for s in steps if s.time == self.time_index), None)
        if s is None:
            return piece, "fixed", ""
        return s.piece, s.status, s.note

    def pieces_now(self):
        """The pieces at the selected time: fixed ones as they are, following ones with their
        tracked outline; a piece lost at this time is left out (its forcing goes to the
        remainder)."""
        out = []
        for p in self.pieces:
            q = self._piece_now(p)[0]
            if q is not None:
                out.append(q)
        return out

    def track_status(self):
        """``{name: (status, note)}`` of the following pieces at the selected time (status:
        start, tracked, split, merged, split+merged, lost, not tracked)."""
        return {p.name: self._piece_now(p)[1:] for p in self.pieces if p.follow == "anomaly"}

    # ------------------------------------------------------------------ undo and redo
    #: the parts of the state that undo/redo restore
    UNDO_KEYS = ("pieces", "sections", "active_section", "annotations", "target")
    #: steps kept (oldest dropped first)
    HISTORY_STEPS = 100

    def _history_init(self):
        self._undo, self._redo = [], []
        self._restoring = False
        self._hist_last = self._snapshot()
        self.param.watch(self._history_record, list(self.UNDO_KEYS))
        self.param.watch(lambda *ev: self.clear_history(), ["case"])

    def _snapshot(self):
        from .annotations import annotations_to_list

        return {"pieces": [p.to_dict() for p in self.pieces],
                "sections": [sec.to_dict() for sec in self.sections],
                "active_section": self.active_section,
                "annotations": annotations_to_list(self.annotations),
                "target": None if self.target is None else [float(x) for x in self.target]}

    def _history_record(self, *events):
        if self._restoring:
            return
        now = self._snapshot()
        if now == self._hist_last:
            return
        self._undo = (self._undo + [self._hist_last])[-self.HISTORY_STEPS:]
        self._redo = []
        self._hist_last = now
        self._history_counts()

    def _history_counts(self):
        self.param.update(undo_steps=len(self._undo), redo_steps=len(self._redo))

    def clear_history(self):
        """Forget every undo/redo step (a new case)."""
        self._undo, self._redo = [], []
        self._hist_last = self._snapshot()
        self._history_counts()

    @property
    def can_undo(self):
        return bool(self._undo)

    @property
    def can_redo(self):
        return bool(self._redo)

    def _restore(self, snap):
        from .annotations import annotations_from_list

        api = _piece_api()
        pieces = [api.Piece.from_dict(d) for d in snap["pieces"]]
        sections = [Section.from_dict(d) for d in snap["sections"]]
        anns = annotations_from_list(snap["annotations"])
        target = None if snap["target"] is None else tuple(float(x) for x in snap["target"])
        self._restoring = True
        try:
            with param.parameterized.batch_call_watchers(self):
                self.pieces = pieces
                self.sections = sections
                self.active_section = snap["active_section"]
                self.annotations = anns
                self.target = target
        finally:
            self._restoring = False
        self._hist_last = self._snapshot()
        self._history_counts()

    def undo(self):
        """Undo the last change of pieces, sections, targets or annotations; returns False
        when there is nothing to undo."""
        if not self._undo:
            return False
        snap = self._undo.pop()
        self._redo.append(self._hist_last)
        self._restore(snap)
        return True

    def redo(self):
        """Redo the last undone change; returns False when there is nothing to redo."""
        if not self._redo:
            return False
        snap = self._redo.pop()
        self._undo.append(self._hist_last)
        self._restore(snap)
        return True

    def history_to_dict(self):
        """The undo/redo steps as plain JSON types (saved with the session)."""
        return {"undo": list(self._undo), "redo": list(self._redo)}

    def history_from_dict(self, d):
        """Take over undo/redo steps saved by :meth:`history_to_dict`; every step is checked
        (pieces, sections, annotations rebuilt) so a bad step is refused now, not at undo."""
        from .annotations import annotations_from_list

        if d is None:
            self.clear_history()
            return
        if not isinstance(d, dict) or not all(isinstance(d.get(k, []), list) for k in ("undo", "redo")):
            raise InputError("history must be an object with lists 'undo' and 'redo'")
        api = _piece_api()
        steps = {}
        for k in ("undo", "redo"):
            steps[k] = []
            for snap in d.get(k, [])[-self.HISTORY_STEPS:]:
                if not isinstance(snap, dict) or set(snap) != set(self.UNDO_KEYS):
                    raise InputError(f"history step must hold exactly {', '.join(self.UNDO_KEYS)}")
                [api.Piece.from_dict(x) for x in snap["pieces"]]
                [Section.from_dict(x) for x in snap["sections"]]
                annotations_from_list(snap["annotations"])
                steps[k].append(snap)
        self._undo, self._redo = steps["undo"], steps["redo"]
        self._hist_last = self._snapshot()
        self._history_counts()

    # ------------------------------------------------------------------ nonlinear refine
    def refine_key(self):
        """What a nonlinear refine depends on (time, member, reference, floor, pieces)."""
        return (self.time_index, self.member, self.reference, bool(self.balance_floor),
                tuple(_physics_key(p) for p in self.pieces))

    def set_refined(self, key, results):
        """Keep the nonlinear results of :meth:`refine_key` ``key`` (made by a background job)."""
        self.__dict__["_refined"] = (key, results)

    def refined_results(self):
        """The nonlinear-balance results of the current pieces if a refine made them, else None."""
        got = self.__dict__.get("_refined")
        if got is not None and got[0] == self.refine_key():
            return got[1]
        return None

    def balanced_results(self):
        """(results, balance used): the refined nonlinear results when ``balance`` is
        'nonlinear' and they are up to date, else the QG results (the instant preview)."""
        if self.balance == "nonlinear" and self.pieces:
            nl = self.refined_results()
            if nl is not None:
                return nl, "nonlinear"
        return self.results(), "qg"

    def briefing_options(self):
        """make_briefing's keywords from :attr:`briefing` (checked: InputError)."""
        from .brief import briefing_pages, briefing_texts

        b = dict(self.briefing or {})
        unknown = sorted(set(b) - {"headline", "summary", "author", "office", "pages"})
        if unknown:
            raise InputError(f"briefing field {unknown[0]!r} is unknown; use headline, summary, "
                             "author, office, pages")
        texts = briefing_texts(b.get("headline") or None, b.get("summary") or None,
                               b.get("author") or None, b.get("office") or None)
        pages = b.get("pages")
        return dict(texts, pages=None if pages is None else briefing_pages(pages, "tendency" in pages))

    # ------------------------------------------------------------------ serialisation
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON types: settings, pieces, sections, annotations, target, figure settings."""
        from .annotations import annotations_to_list

        case = self.case
        d: dict[str, Any] = {
            "time_index": int(self.time_index),
            "time": str(case.times[self.time_index])[:19] if case is not None else None,
            "member": None if self.member is None else int(self.member),
            "surface": self.surface,
            "field": self.field,
            "overlay_level_hpa": float(self.overlay_level),
            "reference": self.reference,
            "tropopause_threshold_pvu": float(self.threshold),
            "pieces": [p.to_dict() for p in self.pieces],
            "sections": [s.to_dict() for s in self.sections],
            "active_section": self.active_section,
            "annotations": annotations_to_list(self.annotations),
            "target": None if self.target is None else [float(x) for x in self.target],
            "figure_settings": _figure_settings_dict(self.figure_settings),
            "overlay": {"contour_interval_m": self.overlay_contour_interval,
                        "arrow_stride": self.overlay_arrow_stride,
                        "arrow_speed_ms": self.overlay_arrow_speed,
                        "left_out": list(self.overlay_left_out)},
            "balance": self.balance,
            "balance_floor": bool(self.balance_floor),
            "briefing": dict(self.briefing or {}),
            "whatif": self.whatif,
            "history": self.history_to_dict(),
        }
        if case is not None:
            d["case"] = {"name": case.name, "path": str(case.source), "sha256": case.checksum}
        return d

    @classmethod
    def from_dict(cls, d, case):
        """Rebuild a State on ``case`` from :meth:`to_dict` output (validating every entry)."""
        from .annotations import annotations_from_list

        if not isinstance(d, dict):
            raise InputError("a workbench state must be a JSON object (dict)")
        from .session import check_caps

        check_caps(d)  # counts and sizes first: nothing expensive on an oversized state
        api = _piece_api()
        st = cls(case=case)
        ti = int(d.get("time_index", 0))
        t = d.get("time")
        if t is not None and case is not None:
            hits = [i for i, x in enumerate(case.times) if str(x)[:19] == str(t)[:19]]
            if not hits:
                raise InputError(f"state time {t} is not a time of case {case.name!r}")
            ti = hits[0]
        pieces = [api.Piece.from_dict(p) for p in d.get("pieces", [])]
        names = [p.name for p in pieces]
        if len(set(names)) != len(names):
            raise PieceError(f"piece names must be unique; got {names}")
        sections = [Section.from_dict(s) for s in d.get("sections", [])]
        active = d.get("active_section")
        if active is not None and not (isinstance(active, int) and 0 <= active < len(sections)):
            raise InputError(f"active_section {active!r} does not name one of the "
                             f"{len(sections)} sections")
        target = d.get("target")
        if target is not None:
            if not (isinstance(target, (list, tuple)) and len(target) == 3):
                raise InputError(f"target {target!r} must be [lon, lat, pressure_hpa]")
            target = tuple(float(x) for x in target)
        with param.parameterized.batch_call_watchers(st):
            st.time_index = ti
            if d.get("member") is not None:
                st.member = int(d["member"])
            st.surface = d.get("surface", st.surface)
            if "field" in d:
                st.field = d["field"]
            st.overlay_level = float(d.get("overlay_level_hpa", st.overlay_level))
            st.reference = str(d.get("reference", st.reference))
            st.threshold = float(d.get("tropopause_threshold_pvu", st.threshold))
            st.pieces = pieces
            st.sections = sections
            st.active_section = active
            st.annotations = annotations_from_list(d.get("annotations", []))
            st.target = target
            st.figure_settings = d.get("figure_settings")
            ov = d.get("overlay") or {}
            if not isinstance(ov, dict):
                raise InputError("'overlay' of a workbench state must be a JSON object")
            st.overlay_contour_interval = ov.get("contour_interval_m")
            st.overlay_arrow_stride = ov.get("arrow_stride")
            st.overlay_arrow_speed = ov.get("arrow_speed_ms")
            st.overlay_left_out = ov.get("left_out") or []
            if d.get("balance", "qg") not in ("qg", "nonlinear"):
                raise InputError(f"balance {d.get('balance')!r} is unknown; use 'qg' or 'nonlinear'")
            st.balance = d.get("balance", "qg")
            st.balance_floor = bool(d.get("balance_floor", False))
            for key in ("briefing", "whatif"):
                if d.get(key) is not None and not isinstance(d.get(key), dict):
                    raise InputError(f"{key!r} of a workbench state must be a JSON object")
            st.briefing = dict(d.get("briefing") or {})
            st.briefing_options()  # bad texts or page names refused on load
            st.whatif = d.get("whatif")
        st.history_from_dict(d.get("history"))
        return st

    #: What :meth:`assign` copies (the user's choices; not case, status or busy).
    CHOICES = ("time_index", "member", "surface", "field", "overlay_level", "reference",
               "threshold", "pieces", "sections", "active_section", "annotations", "target",
               "figure_settings", "overlay_contour_interval", "overlay_arrow_stride",
               "overlay_arrow_speed", "overlay_left_out", "balance", "balance_floor", "briefing",
               "whatif")

    def assign(self, other):
        """Take over every choice of ``other`` (a State on the same case, e.g. a reloaded
        session) in place, so that views and widgets watching this State follow.

        Raises InputError when ``other`` is on a different case (compare checksums): switch
        the case first with :meth:`set_case`."""
        if other.case is not self.case and getattr(other.case, "checksum", None) != \
                getattr(self.case, "checksum", None):
            raise InputError("the state to take over belongs to another case; open that case "
                             "first (set_case), then assign")
        values = {k: getattr(other, k) for k in self.CHOICES}
        with param.parameterized.batch_call_watchers(self):
            if self.case is not other.case:
                self.case = other.case
                self._fit_to_case()
            for k, v in values.items():
                setattr(self, k, v)
        self.history_from_dict(other.history_to_dict())
        return self
