"""Annotations: text labels, arrows and highlighted regions (plain data).

An annotation lives in one *space*:

* ``"map"``: positions are longitude/latitude in degrees (:class:`Label`,
  :class:`Arrow`, :class:`Region`);
* ``"section:<key>"``: positions are along-section distance (km from the start
  point) and pressure (hPa) on the cross-section whose id or index is ``<key>``
  (:class:`SectionLabel`, :class:`SectionArrow`, :class:`SectionRegion`).

Every annotation converts to and from a plain JSON-able ``dict``
(:meth:`to_dict` / :func:`annotation_from_dict`). Reading a dict validates
every field (types, ranges, known keys); nothing is evaluated. Invalid input
raises :class:`workbench.errors.AnnotationError` naming the field and the fix.

This module draws nothing; the views (``workbench.views``) read these objects.
"""
from __future__ import annotations

import math
import re
import uuid
from dataclasses import dataclass, field, fields
from typing import Any, ClassVar

from workbench.errors import AnnotationError

__all__ = [
    "PALETTE",
    "resolve_colour",
    "Label",
    "Arrow",
    "Region",
    "SectionLabel",
    "SectionArrow",
    "SectionRegion",
    "ANNOTATION_TYPES",
    "annotation_from_dict",
    "annotations_to_list",
    "annotations_from_list",
    "in_space",
    "section_space",
    "edited",
    "TEXT_FIELD",
]

#: Named colours accepted for annotations (a colour-blind-safe set plus black,
#: white and grey). Any ``#rgb``/``#rrggbb``/``#rrggbbaa`` hex string is also accepted.
PALETTE: dict[str, str] = {
    "black": "#000000",
    "white": "#ffffff",
    "grey": "#7f7f7f",
    "orange": "#e69f00",
    "sky": "#56b4e9",
    "green": "#009e73",
    "yellow": "#f0e442",
    "blue": "#0072b2",
    "vermilion": "#d55e00",
    "purple": "#cc79a7",
}

_HEX = re.compile(r"^#(?:[0-9a-fA-F]{3}|[0-9a-fA-F]{6}|[0-9a-fA-F]{8})$")
_SECTION_SPACE = re.compile(r"^section:[A-Za-z0-9_.\-]{1,64}$")
_ID = re.compile(r"^[A-Za-z0-9_.\-]{1,64}$")
MAX_TEXT = 500
MAX_VERTICES = 2000
LINESTYLES = ("solid", "dashed", "dotted", "dashdot")
WEIGHTS = ("normal", "bold")


def resolve_colour(value: str, name: str = "colour") -> str:
    """Return the hex string for a palette name or a hex colour; raise AnnotationError otherwise."""
    if not isinstance(value, str):
        raise AnnotationError(
            f"annotation {name} must be a string (a name from PALETTE or '#rrggbb'), got {value!r}"
        )
    key = value.strip().lower()
    if key in PALETTE:
        return PALETTE[key]
    if _HEX.match(key):
        return key
    raise AnnotationError(
        f"annotation {name} {value!r} is not a known colour; use one of "
        f"{', '.join(PALETTE)} or a hex string like '#d55e00'"
    )


def section_space(key: int | str) -> str:
    """The space string of a cross-section, e.g. ``section_space(0) == "section:0"``."""
    space = f"section:{key}"
    if not _SECTION_SPACE.match(space):
        raise AnnotationError(
            f"section key {key!r} must be an index or an id of letters, digits, '_', '.', '-'"
        )
    return space


# --------------------------------------------------------------------------- validators


def _num(name, value, lo=None, hi=None):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise AnnotationError(f"annotation field {name!r} must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise AnnotationError(f"annotation field {name!r} must be finite, got {value!r}")
    if (lo is not None and value < lo) or (hi is not None and value > hi):
        raise AnnotationError(
            f"annotation field {name!r} = {value} is outside [{lo}, {hi}]; give a value in range"
        )
    return value


def _text(name, value, allow_empty=False):
    if value is None and allow_empty:
        return None
    if not isinstance(value, str):
        raise AnnotationError(f"annotation field {name!r} must be text, got {value!r}")
    if not value.strip() and not allow_empty:
        raise AnnotationError(f"annotation field {name!r} is empty; give some text")
    if len(value) > MAX_TEXT:
        raise AnnotationError(
            f"annotation field {name!r} has {len(value)} characters; keep it to {MAX_TEXT}"
        )
    return value if value.strip() else None


def _choice(name, value, options):
    if value not in options:
        raise AnnotationError(
            f"annotation field {name!r} = {value!r} is not one of {', '.join(options)}"
        )
    return value


def _bool(name, value):
    if not isinstance(value, bool):
        raise AnnotationError(f"annotation field {name!r} must be true or false, got {value!r}")
    return value


def _new_id() -> str:
    return uuid.uuid4().hex[:10]


# Position ranges per coordinate kind.
_LON = dict(lo=-360.0, hi=720.0)
_LAT = dict(lo=-90.0, hi=90.0)
_DIST = dict(lo=0.0, hi=40100.0)  # km, at most once round the Earth
_PRES = dict(lo=0.01, hi=1100.0)  # hPa


class _Base:
    """Shared behaviour: validation on construction, dict round trip."""

    kind: ClassVar[str]
    coords: ClassVar[tuple[str, str]]  # names of the two position coordinates

    def _validate_common(self):
        if not isinstance(self.id, str) or not _ID.match(self.id):
            raise AnnotationError(
                f"annotation id {self.id!r} must be 1-64 letters, digits, '_', '.', '-'"
            )
        self.colour = resolve_colour(self.colour)

    def _check_space(self):
        if self.coords == ("lon", "lat"):
            if self.space != "map":
                raise AnnotationError(
                    f"{type(self).__name__} is placed in lon/lat, so its space must be 'map', "
                    f"not {self.space!r}; use Section{type(self).__name__} for sections"
                )
        else:
            if not isinstance(self.space, str) or not _SECTION_SPACE.match(self.space):
                raise AnnotationError(
                    f"{type(self).__name__} space {self.space!r} must look like 'section:0' "
                    "or 'section:<section id>'"
                )

    def _check_point(self, prefix, x, y):
        xname, yname = self.coords
        rx = _LON if xname == "lon" else _DIST
        ry = _LAT if yname == "lat" else _PRES
        return (_num(f"{prefix}{xname}", x, **rx), _num(f"{prefix}{yname}", y, **ry))

    @property
    def section_key(self) -> str | None:
        """The section id/index part of ``space`` (``None`` for map annotations)."""
        return self.space.split(":", 1)[1] if self.space.startswith("section:") else None

    def to_dict(self) -> dict[str, Any]:
        """A plain JSON-able dict with a ``type`` key (round-trips via annotation_from_dict)."""
        out: dict[str, Any] = {"type": self.kind}
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, (list, tuple)):
                value = [list(v) if isinstance(v, (list, tuple)) else v for v in value]
            out[f.name] = value
        return out

    @classmethod
    def from_dict(cls, d: dict[str, Any]):
        """Build from a dict made by :meth:`to_dict`; unknown keys are refused."""
        if not isinstance(d, dict):
            raise AnnotationError(f"an annotation must be a JSON object, got {type(d).__name__}")
        d = dict(d)
        kind = d.pop("type", cls.kind)
        if kind != cls.kind:
            raise AnnotationError(f"annotation type {kind!r} does not match {cls.kind!r}")
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise AnnotationError(
                f"{cls.kind} annotation has unknown field(s) {', '.join(unknown)}; "
                f"known fields are {', '.join(sorted(names))}"
            )
        try:
            return cls(**d)
        except TypeError as exc:  # a required field is missing
            raise AnnotationError(f"{cls.kind} annotation: {exc}; give every required field") from None


# --------------------------------------------------------------------------- map space


@dataclass
class Label(_Base):
    """A text label at (lon, lat) on the map."""

    text: str
    lon: float
    lat: float
    colour: str = "black"
    size: float = 10.0  # points
    weight: str = "bold"
    box: bool = True  # draw a white box behind the text
    space: str = "map"
    id: str = field(default_factory=_new_id)

    kind: ClassVar[str] = "label"
    coords: ClassVar[tuple[str, str]] = ("lon", "lat")

    def __post_init__(self):
        self.text = _text("text", self.text)
        self._check_space()
        self.lon, self.lat = self._check_point("", self.lon, self.lat)
        self.size = _num("size", self.size, 4.0, 72.0)
        self.weight = _choice("weight", self.weight, WEIGHTS)
        self.box = _bool("box", self.box)
        self._validate_common()

    def points(self) -> list[tuple[float, float]]:
        """Positions in the space's coordinates: ``[(x, y)]``."""
        return [(self.lon, self.lat)]


@dataclass
class Arrow(_Base):
    """An arrow from (start_lon, start_lat) to (end_lon, end_lat), optional text at its tail."""

    start_lon: float
    start_lat: float
    end_lon: float
    end_lat: float
    text: str | None = None
    colour: str = "black"
    width: float = 1.5  # points
    size: float = 10.0  # text size, points
    space: str = "map"
    id: str = field(default_factory=_new_id)

    kind: ClassVar[str] = "arrow"
    coords: ClassVar[tuple[str, str]] = ("lon", "lat")

    def __post_init__(self):
        self._check_space()
        self.start_lon, self.start_lat = self._check_point("start_", self.start_lon, self.start_lat)
        self.end_lon, self.end_lat = self._check_point("end_", self.end_lon, self.end_lat)
        if (self.start_lon, self.start_lat) == (self.end_lon, self.end_lat):
            raise AnnotationError("arrow start and end are the same point; move one end")
        self.text = _text("text", self.text, allow_empty=True)
        self.width = _num("width", self.width, 0.1, 20.0)
        self.size = _num("size", self.size, 4.0, 72.0)
        self._validate_common()

    def points(self) -> list[tuple[float, float]]:
        return [(self.start_lon, self.start_lat), (self.end_lon, self.end_lat)]


@dataclass
class _RegionBase(_Base):
    """A highlighted polygon, optional label at its centroid (shared by both spaces)."""

    polygon: list
    label: str | None = None
    colour: str = "vermilion"  # outline
    fill: str | None = None  # fill colour, None for outline only
    alpha: float = 0.25  # fill opacity
    width: float = 2.0  # outline width, points
    linestyle: str = "dashed"
    space: str = "map"
    id: str = field(default_factory=_new_id)

    def __post_init__(self):
        self._check_space()
        poly = self.polygon
        if not isinstance(poly, (list, tuple)):
            raise AnnotationError("region polygon must be a list of [x, y] vertices")
        if len(poly) > MAX_VERTICES:
            raise AnnotationError(
                f"region polygon has {len(poly)} vertices; simplify it to at most {MAX_VERTICES}"
            )
        pts = []
        for k, p in enumerate(poly):
            if not isinstance(p, (list, tuple)) or len(p) != 2:
                raise AnnotationError(f"region polygon vertex {k} must be a pair [x, y], got {p!r}")
            pts.append(self._check_point(f"polygon[{k}].", p[0], p[1]))
        if len(pts) > 1 and pts[0] == pts[-1]:
            pts = pts[:-1]  # closing vertex is implied
        if len(set(pts)) < 3:
            raise AnnotationError(
                "region polygon needs at least 3 distinct vertices; draw a larger shape"
            )
        self.polygon = [tuple(p) for p in pts]
        self.label = _text("label", self.label, allow_empty=True)
        if self.fill is not None:
            self.fill = resolve_colour(self.fill, "fill")
        self.alpha = _num("alpha", self.alpha, 0.0, 1.0)
        self.width = _num("width", self.width, 0.1, 20.0)
        self.linestyle = _choice("linestyle", self.linestyle, LINESTYLES)
        self._validate_common()

    def points(self) -> list[tuple[float, float]]:
        return list(self.polygon)

    def centroid(self) -> tuple[float, float]:
        """Area centroid of the polygon (vertex mean if the area is ~0)."""
        xs = [p[0] for p in self.polygon]
        ys = [p[1] for p in self.polygon]
        n = len(xs)
        a = cx = cy = 0.0
        for i in range(n):
            j = (i + 1) % n
            cross = xs[i] * ys[j] - xs[j] * ys[i]
            a += cross
            cx += (xs[i] + xs[j]) * cross
            cy += (ys[i] + ys[j]) * cross
        if abs(a) < 1e-12:
            return (sum(xs) / n, sum(ys) / n)
        return (cx / (3.0 * a), cy / (3.0 * a))


# --------------------------------------------------------------------------- section space


@dataclass
class SectionLabel(_Base):
    """A text label at (distance_km, pressure_hpa) on a cross-section."""

    text: str
    distance_km: float
    pressure_hpa: float
    colour: str = "black"
    size: float = 10.0
    weight: str = "bold"
    box: bool = True
    space: str = "section:0"
    id: str = field(default_factory=_new_id)

    kind: ClassVar[str] = "section_label"
    coords: ClassVar[tuple[str, str]] = ("distance_km", "pressure_hpa")

    def __post_init__(self):
        self.text = _text("text", self.text)
        self._check_space()
        self.distance_km, self.pressure_hpa = self._check_point(
            "", self.distance_km, self.pressure_hpa
        )
        self.size = _num("size", self.size, 4.0, 72.0)
        self.weight = _choice("weight", self.weight, WEIGHTS)
        self.box = _bool("box", self.box)
        self._validate_common()

    def points(self):
        return [(self.distance_km, self.pressure_hpa)]


@dataclass
class SectionArrow(_Base):
    """An arrow on a cross-section, ends in (distance_km, pressure_hpa)."""

    start_distance_km: float
    start_pressure_hpa: float
    end_distance_km: float
    end_pressure_hpa: float
    text: str | None = None
    colour: str = "black"
    width: float = 1.5
    size: float = 10.0
    space: str = "section:0"
    id: str = field(default_factory=_new_id)

    kind: ClassVar[str] = "section_arrow"
    coords: ClassVar[tuple[str, str]] = ("distance_km", "pressure_hpa")

    def __post_init__(self):
        self._check_space()
        self.start_distance_km, self.start_pressure_hpa = self._check_point(
            "start_", self.start_distance_km, self.start_pressure_hpa
        )
        self.end_distance_km, self.end_pressure_hpa = self._check_point(
            "end_", self.end_distance_km, self.end_pressure_hpa
        )
        if self.points()[0] == self.points()[1]:
            raise AnnotationError("arrow start and end are the same point; move one end")
        self.text = _text("text", self.text, allow_empty=True)
        self.width = _num("width", self.width, 0.1, 20.0)
        self.size = _num("size", self.size, 4.0, 72.0)
        self._validate_common()

    def points(self):
        return [
            (self.start_distance_km, self.start_pressure_hpa),
            (self.end_distance_km, self.end_pressure_hpa),
        ]


@dataclass
class Region(_RegionBase):
    """A highlighted polygon of (lon, lat) vertices on the map."""

    kind: ClassVar[str] = "region"
    coords: ClassVar[tuple[str, str]] = ("lon", "lat")


@dataclass
class SectionRegion(_RegionBase):
    """A highlighted polygon of (distance_km, pressure_hpa) vertices on a cross-section."""

    space: str = "section:0"

    kind: ClassVar[str] = "section_region"
    coords: ClassVar[tuple[str, str]] = ("distance_km", "pressure_hpa")


#: type name -> class, for :func:`annotation_from_dict`.
ANNOTATION_TYPES: dict[str, type] = {
    cls.kind: cls for cls in (Label, Arrow, Region, SectionLabel, SectionArrow, SectionRegion)
}


def annotation_from_dict(d: dict[str, Any]):
    """Build the annotation a :meth:`to_dict` dict describes (dispatch on its ``type``)."""
    if not isinstance(d, dict):
        raise AnnotationError(f"an annotation must be a JSON object, got {type(d).__name__}")
    kind = d.get("type")
    if kind not in ANNOTATION_TYPES:
        raise AnnotationError(
            f"annotation type {kind!r} is unknown; use one of {', '.join(ANNOTATION_TYPES)}"
        )
    return ANNOTATION_TYPES[kind].from_dict(d)


def annotations_to_list(items) -> list[dict[str, Any]]:
    """Dicts of a sequence of annotations (already-dict items are validated and normalised)."""
    return [
        (annotation_from_dict(a) if isinstance(a, dict) else a).to_dict() for a in (items or [])
    ]


def annotations_from_list(items) -> list:
    """Annotations from a list of dicts; ids must be unique."""
    if items is None:
        return []
    if not isinstance(items, (list, tuple)):
        raise AnnotationError("annotations must be a list of JSON objects")
    out = [annotation_from_dict(d) if isinstance(d, dict) else _check_obj(d) for d in items]
    seen = set()
    for a in out:
        if a.id in seen:
            raise AnnotationError(f"annotation id {a.id!r} appears twice; give each a unique id")
        seen.add(a.id)
    return out


def _check_obj(a):
    if type(a) not in ANNOTATION_TYPES.values():
        raise AnnotationError(f"{a!r} is not an annotation; use Label, Arrow, Region or Section*")
    return a


def in_space(items, space: str) -> list:
    """The annotations of ``items`` placed in ``space`` (``"map"`` or ``"section:<key>"``)."""
    return [a for a in (items or []) if getattr(a, "space", None) == space]


#: the field that holds an annotation's text, by type (what "edit the text" changes)
TEXT_FIELD = {"label": "text", "arrow": "text", "region": "label", "section_label": "text",
              "section_arrow": "text", "section_region": "label"}


def edited(annotation, **changes):
    """A copy of ``annotation`` with ``changes`` (field name -> value; ``text`` means the
    type's text field, :data:`TEXT_FIELD`), validated like a new one (AnnotationError); the id
    stays the same."""
    d = annotation.to_dict()
    if "text" in changes:
        d[TEXT_FIELD[d["type"]]] = changes.pop("text")
    unknown = [k for k in changes if k not in d]
    if unknown:
        raise AnnotationError(f"a {d['type']} has no field {', '.join(map(repr, unknown))}; fields: "
                              f"{', '.join(k for k in d if k not in ('type', 'id'))}")
    d.update(changes)
    return annotation_from_dict(d)
