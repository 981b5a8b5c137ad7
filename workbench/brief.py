"""The briefing PDF: one command from a case and a session to a multi-page PDF.

Pages, in order:

1. title page: case, data source and checksum, times, the invented-case label
   when the case says it is invented, the settings and pieces, the caution;
2. the session's map (field on its surface) with the balanced-flow overlay of
   the visible pieces and the annotations;
3. theta on the dynamic tropopause with the same overlay (left out when the
   session's map already is on the tropopause);
4. one page per section line of the session;
5. the attribution table at the target point and one generated sentence per
   piece on its share of the balanced height anomaly there;
6. with ``balance="nonlinear"``: where nonlinear balance and QG differ (the speed of the
   nonlinear minus the QG balanced wind at 500 hPa, with the RMS balanced-minus-analysed wind
   of both balances there);
7. with ``tendency=True``: the QG tendency attribution matrix.

The title page can carry a headline, a free-text summary box and the forecaster's name and
office (plain text, never interpreted as markup); ``pages=`` chooses the pages after the
title page and their order (:data:`PAGES`).

Every page carries the caution line. The PDF is written to a temporary file
and renamed (never overwritten without ``overwrite=True``).

Command line (wired to ``pvwb brief``)::

    pvwb brief CASE --session FILE -o brief.pdf [--overwrite] [--headline TEXT]
        [--summary TEXT | --summary-file FILE] [--author NAME] [--office NAME]
        [--pages map,attribution,...]
"""
from __future__ import annotations

import dataclasses
import math
import sys
import textwrap
from pathlib import Path

import numpy as np

from workbench.errors import ExportError, InputError, WorkbenchError
from workbench.export import CAUTION, atomic_target, invented_label, package_version, utc_now_iso
from workbench.views.styles import domain_label, lat_label, lon_label

__all__ = ["make_briefing", "briefing_figures", "briefing_texts", "briefing_pages", "PAGES", "piece_summaries",
           "main"]

PAGE = (11.69, 8.27)  # A4 landscape, inches


def standard_state(case, time=None):
    """The state a briefing uses when no session is given: the time of the deepest low (the
    minimum of mean sea-level pressure, or of the lowest level's geopotential) unless ``time``
    is given, the standard pieces (:func:`workbench.analysis.standard_pieces`), the attribution
    target at the storm centre on the overlay level, and a west-east section through it. The
    upper, lower and surface pieces are drawn; the others are in the attribution table only."""
    import numpy as np

    from workbench.analysis import cyclonic_sign, standard_pieces, storm_centre
    from workbench.state import State

    if time is None:
        field = case.data["mslp"] if "mslp" in case.data else case.data["geopotential"].isel(pressure=0)
        dims = [d for d in field.dims if d not in ("time",)]
        ti = int(np.nanargmin(field.min(dims).values))
    else:
        ti = case.time_index(time)
    st = State(case, time_index=ti)
    for piece in standard_pieces(moist=case.relative_humidity(ti) is not None, hemisphere=cyclonic_sign(case)):
        # the lid, lateral and remainder pieces count in the table but are not drawn, so that
        # maps and sections show the three pieces a forecaster reads first
        piece.visible = piece.kind in ("interior", "bottom")
        st.add_piece(piece)
    lon, lat = storm_centre(case, ti)
    st.set_target(lon, lat)
    d = case.domain
    half = min(20.0, 0.45 * (d["lon_max"] - d["lon_min"]))
    west = max(d["lon_min"] + 1.0, lon - half)
    east = min(d["lon_max"] - 1.0, lon + half)
    st.add_section((west, lat), (east, lat), name="west-east through the storm centre")
    return st


def _state_of(case, state_or_session):
    from workbench.state import State

    if state_or_session is None:
        return standard_state(case)
    if isinstance(state_or_session, (str, Path)):
        from workbench.session import load_session

        return load_session(state_or_session, case=case)
    if isinstance(state_or_session, dict):
        from workbench.session import check_case, state_body, FigureSettings

        if state_or_session.get("schema") is not None:
            check_case(state_or_session, case)
            st = State.from_dict(state_body(state_or_session), case)
            st.figure_settings = FigureSettings.from_dict(
                state_or_session.get("figure_settings")).to_dict()
            return st
        return State.from_dict(state_or_session, case)
    if hasattr(state_or_session, "pieces") and hasattr(state_or_session, "case"):
        if state_or_session.case is not case and case is not None:
            have = getattr(state_or_session.case, "checksum", None)
            if have != getattr(case, "checksum", None):
                raise InputError(
                    "the state belongs to another case (checksums differ); pass the state's own "
                    "case or load the session with this case"
                )
        return state_or_session
    raise InputError(
        f"make_briefing needs a State, a session file path or a session dict, not "
        f"{type(state_or_session).__name__}"
    )


def _fmt_lonlat(lon, lat) -> str:
    """A point as the page and the command line write it: ``43.5°W, 53.0°N``."""
    return f"{lon_label(lon)}, {lat_label(lat)}"


#: piece kinds and signs in words, as the page's pieces table shows them
KIND_WORDS = {"interior": "interior PV", "bottom": "surface θ′", "top": "lid θ′",
              "lateral": "lateral boundary", "remainder": "remainder"}
SIGN_WORDS = {1: "positive", -1: "negative", 0: "both"}


def _piece_line(p) -> str:
    bits = [f"{p.name} ({KIND_WORDS.get(p.kind, p.kind)}"]
    if getattr(p, "layer", None):
        lo, hi = p.layer
        unit = "hPa" if p.layer_coord == "pressure" else "K"
        bits.append(f", {min(lo, hi):g}-{max(lo, hi):g} {unit}")
    sign = SIGN_WORDS.get(getattr(p, "sign", 0), "")
    if p.kind in ("interior", "bottom", "top") and sign:
        bits.append(f", sign {sign}")
    if getattr(p, "threshold", 0):
        if p.kind == "interior":
            bits.append(f", minimum |PV anomaly| {p.threshold:g} PVU")
        else:
            bits.append(f", minimum |θ′| {p.threshold:g} K")
    if getattr(p, "rh_min", None) is not None:
        bits.append(f", RH >= {p.rh_min:g} %")
    if getattr(p, "polygon", None):
        bits.append(f", lassoed polygon of {len(p.polygon)} vertices")
    if not getattr(p, "visible", True):
        bits.append(", hidden on maps")
    return "".join(bits) + ")"


def _pct(share) -> str:
    """A share in whole per cent for a sentence (no sign on a share that rounds to zero)."""
    from .inversion.pieces import format_share

    return format_share(share, ".0f")


def piece_summaries(table, target) -> list[str]:
    """One sentence per piece on its share of the balanced height anomaly at the target,
    plus a closing sentence on the sum of pieces against the full inversion.

    ``table`` is the DataFrame of ``workbench.inversion.pieces.attribution``
    (rows: pieces, "sum of pieces", "full inversion"); ``target`` is
    (lon, lat, pressure hPa). The shares are the table's; this only words them.
    """
    lon, lat, p = target
    where = f"{p:g} hPa at {_fmt_lonlat(lon, lat)}"
    full = float(table.loc["full inversion", "height_anomaly"])
    out = []
    small = abs(full) < 1.0
    for name in table.index:
        if name in ("sum of pieces", "full inversion"):
            continue
        z = float(table.loc[name, "height_anomaly"])
        share = float(table.loc[name, "height_share_pct"])
        if not math.isfinite(share):
            out.append(f"{name}: {z:+.1f} m at {where}; the full anomaly there is near zero, so no "
                       "share can be given.")
        elif abs(z) < 0.05 * max(abs(full), 1e-9) and abs(share) < 5:
            out.append(f"{name} contributes little at {where}: {z:+.1f} m ({_pct(share)} % of the "
                       f"full {full:+.1f} m).")
        elif share > 100.5:
            out.append(f"{name} gives {z:+.1f} m at {where}, more than the full {full:+.1f} m "
                       f"({share:.0f} %); other pieces offset part of it.")
        elif share >= 0:
            out.append(f"{name} accounts for {share:.0f} % of the balanced height anomaly at "
                       f"{where} ({z:+.1f} m of {full:+.1f} m).")
        else:
            out.append(f"{name} works against the full anomaly at {where}: {z:+.1f} m against "
                       f"{full:+.1f} m ({share:.0f} %).")
    total = float(table.loc["sum of pieces", "height_anomaly"])
    out.append(f"The pieces sum to {total:+.2f} m; the full inversion gives {full:+.2f} m "
               f"(difference {abs(total - full):.1e} m).")
    if small:
        out.append("The full height anomaly at the target is under 1 m, so the percentages "
                   "there are sensitive; consider another target point.")
    return out


def _default_target(state):
    """When the session has no target: the strongest negative balanced height anomaly of the
    full inversion at the overlay level (the balanced low centre), with a note."""
    res = state.results()
    if not res or "total" not in res:
        return None, None
    tot = res["total"]["height_anomaly"]
    lev = tot["pressure"].values
    k = int(np.argmin(np.abs(lev - state.overlay_level * 100.0)))
    z = tot.isel(pressure=k)
    inner = z.isel(latitude=slice(1, -1), longitude=slice(1, -1))
    vals = np.asarray(inner.values, float)
    if not np.isfinite(vals).any():
        return None, None
    j, i = np.unravel_index(np.nanargmin(vals), vals.shape)
    lon = float(inner["longitude"].values[i])
    lat = float(inner["latitude"].values[j])
    return (lon, lat, float(lev[k]) / 100.0), (
        "No target point was set in the session; the target used is the lowest balanced "
        "height anomaly of the full inversion at the overlay level.")


def _wrapped(fig, text, size, x=0.06, width=None):
    """``text`` wrapped into the lines :func:`_text_page` writes (``width``: characters per line,
    default what fits the page between the margins ``x`` at this font size)."""
    if width is None:
        width = int((1.0 - 2 * x) * fig.get_figwidth() * 72.0 / (0.56 * size))
    lines = []
    for para in str(text).split("\n"):
        lines.extend(textwrap.wrap(para, width=width) or [""])
    return lines


def _text_page(fig, y, text, size=10, weight="normal", width=None, color="black", x=0.06, plain=False):
    """Write wrapped text at height y (figure fraction); return the next free y. ``plain``: the
    text is shown as it is (no mathtext, no TeX), for the user's own texts."""
    lines = _wrapped(fig, text, size, x, width)
    extra = dict(usetex=False, parse_math=False) if plain else {}
    for line in lines:
        fig.text(x, y, line, fontsize=size, fontweight=weight, va="top", ha="left", color=color, **extra)
        y -= size * 1.45 / 72.0 / fig.get_figheight()
    return y


_write = _text_page

#: lowest figure height text may reach above the caution band at the foot of every page
_TEXT_FLOOR = 0.07


def _text_height(fig, text, size, x=0.06):
    """Height (figure fraction) :func:`_text_page` takes for ``text`` at ``size``."""
    return len(_wrapped(fig, text, size, x)) * size * 1.45 / 72.0 / fig.get_figheight()


def _write_fitting(fig, y, blocks, floor=_TEXT_FLOOR):
    """Write ``blocks`` [(text, size, kwargs), ...] from height y down, their font sizes scaled
    by one factor (1 down to 0.6) so that the last line stays above ``floor`` (the caution
    band); return the next free y."""
    factor = 1.0
    while factor > 0.6 and y - sum(_text_height(fig, t, s * factor, kw.get("x", 0.06)) + kw.get("gap", 0.0)
                                   for t, s, kw in blocks) < floor:
        factor -= 0.05
    for text, size, kw in blocks:
        kw = dict(kw)
        y -= kw.pop("gap", 0.0)
        y = _text_page(fig, y, text, size=size * factor, **kw)
    return y


def _first_column_widths(labels, ncols, share_min=0.14, per_char=0.0095):
    """Column widths (fractions of the table) giving the first column room for its longest label."""
    first = min(0.3, max(share_min, per_char * max(len(str(t)) for t in labels) + 0.02))
    return [first] + [(1.0 - first) / (ncols - 1)] * (ncols - 1)


def _caution_band(fig, invented):
    from workbench.views.static import _caution

    _caution(fig, None, invented)


#: the pages a briefing can hold after the title page, in their default order ("balance":
#: where nonlinear balance and QG differ, by default with balance="nonlinear" only)
PAGES = ("map", "tropopause", "sections", "attribution", "balance", "tendency")
#: the most wrapped lines of the summary box on the title page
SUMMARY_MAX_LINES = 10
_SUMMARY_SIZE = 10.5


def _plain_text(value, what, max_chars, one_line=True):
    """A user's text for the title page: a str, at most ``max_chars`` characters, no control
    characters (newlines only where ``one_line`` is false); InputError otherwise."""
    if value is None:
        return None
    if not isinstance(value, str):
        raise InputError(f"briefing {what} must be text, not {type(value).__name__}")
    text = value.replace("\r\n", "\n").replace("\t", " ").strip()
    if len(text) > max_chars:
        raise InputError(f"briefing {what} has {len(text)} characters; at most {max_chars} fit, shorten it")
    bad = [c for c in text if (ord(c) < 32 and c not in ("\n" if not one_line else "")) or ord(c) == 127]
    if bad:
        kind = "a line break" if "\n" in bad else f"the control character {ord(bad[0]):#04x}"
        raise InputError(f"briefing {what} contains {kind}; "
                         + ("give it on one line" if one_line else "remove it"))
    return text or None


def _summary_lines(summary, fig_width=PAGE[0]):
    width = int((1.0 - 2 * 0.08) * fig_width * 72.0 / (0.56 * _SUMMARY_SIZE))
    lines = []
    for para in summary.split("\n"):
        lines.extend(textwrap.wrap(para, width=width) or [""])
    return lines


def briefing_texts(headline=None, summary=None, author=None, office=None) -> dict:
    """The title page's user texts checked (InputError naming the field and the fix): headline
    (one line, at most 160 characters), summary (at most 1500 characters and
    :data:`SUMMARY_MAX_LINES` wrapped lines), forecaster name and office (one line, 120 each)."""
    out = dict(headline=_plain_text(headline, "headline", 160),
               summary=_plain_text(summary, "summary", 1500, one_line=False),
               author=_plain_text(author, "forecaster name", 120),
               office=_plain_text(office, "office", 120))
    if out["summary"]:
        n = len(_summary_lines(out["summary"]))
        if n > SUMMARY_MAX_LINES:
            raise InputError(f"briefing summary fills {n} lines on the title page; at most {SUMMARY_MAX_LINES} "
                             "fit, shorten it")
    return out


def briefing_pages(pages=None, tendency=False, balance="qg") -> list:
    """The pages after the title page, in order: ``pages`` (names of :data:`PAGES`, as a list or
    a comma-separated text) or the default order (the tendency page only with ``tendency``, the
    balance page only with ``balance="nonlinear"``)."""
    if pages is None:
        return [p for p in PAGES if (p != "tendency" or tendency)
                and (p != "balance" or balance == "nonlinear")]
    if isinstance(pages, str):
        pages = [p.strip() for p in pages.split(",") if p.strip()]
    pages = list(pages)
    unknown = [p for p in pages if p not in PAGES]
    if unknown:
        raise InputError(f"briefing page {unknown[0]!r} is unknown; choose from {', '.join(PAGES)}")
    twice = sorted({p for p in pages if pages.count(p) > 1})
    if twice:
        raise InputError(f"briefing page {twice[0]!r} is listed twice; give each page once")
    return pages


def _title_page(case, state, generated, notes=(), texts=None):
    """The title page; its type is made smaller (down to 60 %) until everything sits above the
    caution box (a long summary and many pieces fill the page)."""
    for scale in (1.0, 0.9, 0.8, 0.7, 0.6):
        fig, lowest = _title_page_at(case, state, generated, notes, texts, scale)
        if lowest >= 0.19:
            break
    return fig


def _title_page_at(case, state, generated, notes, texts, scale):
    from matplotlib.figure import Figure

    texts = texts or {}
    low = [1.0]

    def _text_page(fig, y, text, size=10, **kw):  # the module's writer, at this scale
        y = _write(fig, y, text, size=size * scale, **kw)
        low[0] = min(low[0], y)
        return y

    fig = Figure(figsize=PAGE)
    inv = invented_label(case)
    y = 0.93
    y = _text_page(fig, y, "PV diagnosis briefing", size=22, weight="bold")
    y = _text_page(fig, y - 0.01, str(case.name), size=16, weight="bold")
    if inv:
        y = _text_page(fig, y - 0.01, inv, size=13, weight="bold", color="#b03a00")
    if texts.get("headline"):
        y = _text_page(fig, y - 0.01, texts["headline"], size=15, weight="bold", color="#1f3a5f", plain=True)
    who = ", ".join(t for t in (texts.get("author"), texts.get("office")) if t)
    if who:
        y = _text_page(fig, y - 0.005, f"Forecaster: {who}", size=10.5, plain=True)
    if texts.get("summary"):
        lines = _summary_lines(texts["summary"], PAGE[0] / scale)
        step = scale * _SUMMARY_SIZE * 1.45 / 72.0 / PAGE[1]
        top, height = y - 0.015, step * len(lines) + 0.025
        from matplotlib.patches import FancyBboxPatch

        fig.patches.append(FancyBboxPatch((0.06, top - height), 0.88, height, boxstyle="round,pad=0.004",
                                          transform=fig.transFigure, fc="#f4f7fb", ec="#1f3a5f", lw=1.0))
        fig.text(0.075, top - 0.004, "Summary", fontsize=8 * scale, color="#1f3a5f", va="bottom", ha="left",
                 fontweight="bold")
        _text_page(fig, top - 0.012, "\n".join(lines), size=_SUMMARY_SIZE, x=0.08, width=10_000, plain=True)
        y = top - height - 0.005
    t = case.times
    valid = str(np.datetime_as_string(np.datetime64(case.times[state.time_index], "m"))).replace(
        "T", " ") + " UTC"
    first = str(np.datetime_as_string(np.datetime64(t[0], "m"))).replace("T", " ")
    last = str(np.datetime_as_string(np.datetime64(t[-1], "m"))).replace("T", " ")
    from workbench.views.static import _FIELDS, _surface_label

    field_label = _FIELDS.get(state.field, (None, state.field))[1]

    info = [
        f"Data source: {case.source}",
        f"Data checksum (sha256): {case.checksum or 'not recorded (in-memory data)'}",
        f"Times in the case: {len(t)} ({first} to {last} UTC); briefing valid time: {valid}",
    ]
    if case.members is not None:
        info.append(f"Ensemble member: {case.members[state.member or 0]}")
    d = case.domain
    info += [
        f"Domain: {domain_label(d)}; "
        f"{len(case.levels_hpa)} pressure levels {case.levels_hpa.max():g}-{case.levels_hpa.min():g} hPa",
        f"Map: {field_label} {_surface_label(state.surface, state.threshold)}; balanced flow at "
        f"{state.overlay_level:g} hPa; tropopause threshold {state.threshold:g} PVU; "
        f"reference state: {state.reference}",
    ]
    if state.target is not None:
        lon, lat, p = state.target
        info.append(f"Target point: {_fmt_lonlat(lon, lat)} at {p:g} hPa")
    info.append(f"Generated {generated} by PV Workbench {package_version()}")
    y = _text_page(fig, y - 0.03, "\n".join(info), size=10.5)
    y_cols = y - 0.02
    y = _text_page(fig, y - 0.02, "Pieces of the piecewise QG inversion", size=12, weight="bold")
    if state.pieces:
        y = _text_page(fig, y, "\n".join("- " + _piece_line(p) for p in state.pieces), size=10)
    else:
        y = _text_page(fig, y, "none (maps and sections only)", size=10)
    if state.sections:
        y = _text_page(fig, y - 0.02, "Sections", size=12, weight="bold")
        y = _text_page(fig, y, "\n".join(
            f"- {s.name or f'section {k}'}: {_fmt_lonlat(*s.start)} to {_fmt_lonlat(*s.end)}"
            for k, s in enumerate(state.sections)), size=10)
    data_notes = [n for n in getattr(case, "notes", []) if n]
    if data_notes:  # right-hand column, beside the pieces and sections
        yr = _text_page(fig, y_cols, "How the data were read", size=12, weight="bold", x=0.52, width=int(60 / scale))
        width = int(0.44 * fig.get_figwidth() * 72.0 / (0.56 * 8.5 * scale))
        for n in data_notes[:10]:
            if yr < 0.24:
                break
            yr = _text_page(fig, yr, "- " + n, size=8.5, width=width, x=0.52) - 0.004
    if notes:
        y = _text_page(fig, y - 0.02, "Notes from the computation", size=12, weight="bold")
        y = _text_page(fig, y, "\n".join("- " + n for n in notes), size=9.5, color="#8a3b00")
    fig.text(0.5, 0.11, CAUTION, ha="center", va="bottom", fontsize=11, wrap=True,
             fontweight="bold",
             bbox=dict(boxstyle="round,pad=0.6", fc="#fff8dc", ec="#8a6d00", lw=1.2))
    return fig, low[0]


def _table_page(case, state, balance="qg", floor=False):
    from matplotlib.figure import Figure

    fig = Figure(figsize=PAGE)
    inv = invented_label(case)
    y = _text_page(fig, 0.95, f"{case.name}: attribution at the target point", size=15,
                   weight="bold")
    if not state.pieces:
        _text_page(fig, y - 0.02, "The session has no pieces, so there is nothing to attribute.",
                   size=11)
        _caution_band(fig, inv)
        return fig, []
    target, note = (tuple(state.target), None) if state.target is not None else _default_target(state)
    if target is None:
        _text_page(fig, y - 0.02, "No target point could be chosen; set one in the session.",
                   size=11)
        _caution_band(fig, inv)
        return fig, []
    from .analysis import above_ground_target

    target, moved = above_ground_target(case, target, state.time_index, state.member)
    if balance == "nonlinear":  # the session's pieces inverted in nonlinear balance
        from .analysis import analyse

        _, table, _ = analyse(case, state.time_index, state.member, list(state.pieces), target,
                              state.reference, balance="nonlinear", floor=floor)
        extra = [n for n in table.attrs.get("notes", []) if n.startswith("Floor remedy")]
    else:
        table, extra = state.attribution(target), []
    from .analysis import BALANCE_LABELS
    from .inversion.pieces import format_share
    note = "\n".join(n for n in (note, moved, *table.attrs.get("share_notes", []), *extra) if n) or None
    lon, lat, p = target
    valid = str(np.datetime_as_string(np.datetime64(case.times[state.time_index], "m"))).replace(
        "T", " ") + " UTC"
    y = _text_page(fig, y, f"Balanced fields of each piece at {_fmt_lonlat(lon, lat)}, {p:g} hPa; "
                          f"valid {valid}; reference state {state.reference}; {BALANCE_LABELS[balance]}",
                   size=10.5)
    if note:
        y = _text_page(fig, y, note, size=9.5, color="#8a3b00")
    cols = ["piece", "Z' (m)", "u (m s-1)", "v (m s-1)", "speed (m s-1)",
            "\u03b6 (1e-5 s-1)", "Z' share (%)", "\u03b6 share (%)"]
    rows = []
    for name, r in table.iterrows():
        def f(v, fmt):
            return "n/a" if not np.isfinite(v) else format(v, fmt)

        rows.append([str(name), f(r["height_anomaly"], "+.2f"), f(r["u"], "+.2f"),
                     f(r["v"], "+.2f"), f(r["wind_speed"], ".2f"),
                     f(r["relative_vorticity"] * 1e5, "+.2f"), format_share(r["height_share_pct"]),
                     format_share(r["vorticity_share_pct"])])
    n = len(rows) + 1
    h = min(0.04 * n, 0.40)
    ax = fig.add_axes([0.05, y - 0.02 - h, 0.9, h])
    ax.set_axis_off()
    tab = ax.table(cellText=rows, colLabels=cols, loc="upper center", cellLoc="center",
                   colLoc="center", bbox=[0, 0, 1, 1],
                   colWidths=_first_column_widths([r[0] for r in rows], len(cols)))
    tab.auto_set_font_size(False)
    tab.set_fontsize(9)
    for (r, c), cell in tab.get_celld().items():
        if r == 0:
            cell.set_text_props(fontweight="bold")
            cell.set_facecolor("#e8eef6")
        elif rows[r - 1][0] in ("sum of pieces", "full inversion", "nonlinear remainder"):
            cell.set_facecolor("#f2f2f2")
            cell.set_text_props(fontweight="bold")
    y = y - 0.05 - h
    sentences = piece_summaries(table, target)
    if balance == "nonlinear":
        how = ("Shares are of the nonlinear-balance height anomaly of the full inversion at the target; "
               "each piece is linearised about the full balanced state and the 'nonlinear remainder' "
               "row (full minus the sum of the linear pieces) closes the sum.")
    else:
        how = ("Shares are of the balanced (QG) height anomaly of the full inversion at the "
               "target; pieces add up exactly because QG inversion is linear.")
    _write_fitting(fig, y, [("Summary", 12, dict(weight="bold")),
                            ("\n".join("- " + s for s in sentences), 10.5, {}),
                            (how + " Wind speeds do not add (each row is the speed of its own wind).", 8.5,
                             dict(color="#444444", gap=0.01))])
    _caution_band(fig, inv)
    return fig, sentences


def _tendency_page(case, state):
    """The QG tendency attribution matrix at the target (workbench.tendency.explain) and its summary."""
    from matplotlib.figure import Figure

    from .errors import WorkbenchError
    from .tendency import LABEL, explain

    fig = Figure(figsize=PAGE)
    inv = invented_label(case)
    y = _text_page(fig, 0.95, "Why are the heights changing? QG tendency attribution", size=15,
                   weight="bold")
    y = _text_page(fig, y, LABEL, size=9.5, color="#8a3b00")
    try:
        ex = explain(case, state.time_index, state.pieces or None,
                     tuple(state.target) if state.target is not None else None,
                     member=state.member, reference=state.reference)
    except WorkbenchError as exc:
        _text_page(fig, y - 0.02, f"The tendency attribution could not be computed: {exc}", size=11)
        _caution_band(fig, inv)
        return fig
    lon, lat, p = ex.target
    y = _text_page(fig, y, f"Height tendency (m per 6 h) at {_fmt_lonlat(lon, lat)}, {p:g} hPa, {ex.time} UTC: "
                          "row = the balanced wind of a piece, column = the PV (or boundary theta) it carries; "
                          f"entries add up to the full inversion's tendency {ex.total:+.1f} m per 6 h.",
                   size=10)
    for note in ex.notes:
        y = _text_page(fig, y, note, size=9.5, color="#8a3b00")
    m = ex.matrix
    cols = ["wind of \\ PV of"] + [str(c) for c in m.columns] + ["row sum"]
    rows = [[str(i)] + [f"{v:+.1f}" for v in m.loc[i].values] + [f"{m.loc[i].sum():+.1f}"] for i in m.index]
    rows.append(["column sum"] + [f"{v:+.1f}" for v in m.sum(axis=0).values] + [f"{ex.total:+.1f}"])
    h = min(0.045 * (len(rows) + 1), 0.45)
    ax = fig.add_axes([0.03, y - 0.02 - h, 0.94, h])
    ax.set_axis_off()
    tab = ax.table(cellText=rows, colLabels=cols, loc="upper center", cellLoc="center", colLoc="center",
                   bbox=[0, 0, 1, 1], colWidths=_first_column_widths([r[0] for r in rows] + [cols[0]], len(cols),
                                                                     per_char=0.0075))
    tab.auto_set_font_size(False)
    tab.set_fontsize(7.5)
    for (r, c), cell in tab.get_celld().items():
        if r == 0 or c == 0:
            cell.set_text_props(fontweight="bold")
            cell.set_facecolor("#e8eef6")
    _write_fitting(fig, y - 0.05 - h, [("Summary", 12, dict(weight="bold")),
                                       ("\n".join("- " + s for s in ex.summary), 10.5, {})])
    _caution_band(fig, inv)
    return fig


def _notes(caught) -> list[str]:
    """The package's own warnings raised while the pages were made (deduplicated)."""
    out = []
    for w in caught:
        if "workbench" not in str(w.filename).replace("\\", "/"):
            continue
        msg = " ".join(str(w.message).split())
        if msg not in out:
            out.append(msg)
    return out


def briefing_figures(case, state, progress=None, tendency=False, balance="qg", floor=False, pages=None,
                     texts=None) -> list:
    """The briefing's pages as matplotlib Figures (title, maps, sections, attribution).

    ``progress``: optional callable ``progress(fraction, text)``, called once per page made
    (the fraction counts making and writing the pages, as :func:`make_briefing`); it may raise
    (e.g. :class:`~workbench.errors.Cancelled`) to stop.
    ``pages``: which pages follow the title page and in what order (:func:`briefing_pages`);
    ``texts``: the title page's headline, summary, forecaster and office (:func:`briefing_texts`).

    Warnings the package raises while computing (e.g. a domain where constant-f0 QG is
    rough) are listed on the title page under "Notes from the computation"."""
    import warnings

    from workbench.views import static

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        order = briefing_pages(pages, tendency, balance)
        pages = []
        view = static.state_view(state)
        settings = dataclasses.replace(view["settings"], width_in=PAGE[0])
        view["settings"] = settings
        md_kwargs = {k: v for k, v in view.items() if k not in ("case", "sections")}
        n_pages = 1 + sum(len(state.sections) if n == "sections" else 1 for n in order)
        made = [0]

        def tick():
            made[0] += 1
            if progress is not None:
                progress(made[0] / (2 * n_pages), f"page {made[0]} of {n_pages} made")
        for name in order:
            if name == "map":
                pages.append(static.draw_map(static.map_data(case, **md_kwargs), settings,
                                             page_size=PAGE))
                tick()
            elif name == "tropopause" and view["surface"] != "tropopause":
                trop = dict(md_kwargs, field="potential_temperature", surface="tropopause")
                trop_settings = dataclasses.replace(settings, contour_field=None, levels=None,
                                                    colour_map=None)
                trop["settings"] = trop_settings
                pages.append(static.draw_map(static.map_data(case, **trop), trop_settings,
                                             page_size=PAGE))
                tick()
            elif name == "sections":
                for k in range(len(state.sections)):
                    pages.append(static.draw_section(static.state_section_data(state, k), settings,
                                                     page_size=PAGE))
                    tick()
            elif name == "attribution":
                fig, _ = _table_page(case, state, balance=balance, floor=floor)
                pages.append(fig)
                tick()
            elif name == "balance":  # where nonlinear balance and QG differ (whole state)
                from workbench.inversion.nonlinear import balance_quality

                quality = balance_quality(case, state.time_index, state.member, state.reference,
                                          floor=floor)
                pages.append(static.balance_map_figure(quality, 500.0,
                                                       case, state.member, settings, page_size=PAGE))
                tick()
            elif name == "tendency":  # the QG tendency attribution matrix (pvwb brief --tendency)
                pages.append(_tendency_page(case, state))
                tick()
    title = _title_page(case, state, utc_now_iso(), _notes(caught), texts)
    tick()
    return [title] + pages


def make_briefing(case, state_or_session=None, path="briefing.pdf", overwrite: bool = False,
                  progress=None, tendency: bool = False, balance: str = "qg", floor: bool = False, *,
                  headline=None, summary=None, author=None, office=None, pages=None) -> Path:
    """Write the briefing PDF of ``case`` with a State (or a session file/dict) to ``path``.

    Refuses (ExportError) an existing ``path`` unless ``overwrite=True``; the file
    appears only when complete. Returns the path. ``progress``: optional callable
    ``progress(fraction, text)``, called once per page made and once per page written; an
    exception it raises (e.g. :class:`~workbench.errors.Cancelled`) stops the work and leaves
    no file. ``tendency``: add the QG tendency
    attribution page (:mod:`workbench.tendency`). ``balance``: ``"qg"`` (the session's QG
    attribution) or ``"nonlinear"`` (the session's pieces in nonlinear balance, ``floor`` the
    floor remedy); the attribution page names the balance.

    ``headline`` (one line), ``summary`` (free text in a box), ``author`` and ``office`` (the
    forecaster line) go on the title page as plain text (no markup: ``$`` and ``\\`` are shown as
    they are); ``pages``: names of :data:`PAGES` after the title page, in that order (default:
    map, tropopause, sections, attribution, and tendency with ``tendency=True``). Bad texts or
    page names raise InputError before any work.
    """
    from matplotlib.backends.backend_pdf import PdfPages
    import matplotlib

    path = Path(path)
    if path.suffix.lower() != ".pdf":
        raise ExportError(f"briefing file {path.name} must end in .pdf")
    texts = briefing_texts(headline, summary, author, office)
    order = briefing_pages(pages, tendency, balance)
    state = _state_of(case, state_or_session)
    if path.exists() and not overwrite:  # refuse before the work, not after
        raise ExportError(
            f"briefing {path} already exists; pass overwrite=True (or --overwrite) to replace "
            "it, or choose another name"
        )
    with matplotlib.rc_context({"pdf.fonttype": 42}):
        pages = briefing_figures(case, state, progress=progress, tendency=tendency, balance=balance,
                                 floor=floor, pages=order, texts=texts)
        with atomic_target(path, overwrite=overwrite, error=ExportError, what="briefing") as tmp:
            meta = {
                "Title": f"PV diagnosis briefing: {case.name}",
                "Author": ", ".join(t for t in (texts["author"], texts["office"]) if t) or "PV Workbench",
                "Subject": CAUTION,
                "Creator": f"PV Workbench {package_version()}",
                "Keywords": "potential vorticity; piecewise inversion; diagnostic analysis",
            }
            with PdfPages(tmp, metadata=meta) as pdf:
                for k, fig in enumerate(pages, 1):
                    pdf.savefig(fig)
                    if progress is not None:
                        progress(0.5 + 0.5 * k / len(pages), f"page {k} of {len(pages)} written")
    return path


def main(argv=None) -> int:
    """``pvwb brief [CASE] [--region W,E,S,N] [--times SPEC] [--session FILE] -o brief.pdf
    [--overwrite] [--quiet]``; returns an exit code (2 with a one-line message on errors)."""
    from workbench import cli

    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "brief":
        argv = argv[1:]
    ap = cli.build_parser(
        "pvwb brief",
        "Make a multi-page briefing PDF (maps, sections, attribution) from a case "
        "and a saved session. " + CAUTION,
    )
    cli.add_case_argument(ap)
    cli.add_selection_options(ap)
    ap.add_argument("--session", "-s", help="session file (JSON) saved from the workbench (default: the "
                    "standard pieces at the time of the deepest low, target at the storm centre)")
    ap.add_argument("-o", "--output", default="briefing.pdf", help="output PDF (default briefing.pdf)")
    cli.add_overwrite_option(ap)
    ap.add_argument("--accept-modified-session", action="store_true",
                    help="use a session file that was changed after it was saved (or has no "
                         "body checksum); without this it is refused")
    ap.add_argument("--quiet", action="store_true", help="no progress bar")
    ap.add_argument("--tendency", action="store_true", help="add the QG tendency attribution page")
    ap.add_argument("--balance", choices=["qg", "nonlinear"], default="qg",
                    help="balance of the attribution table: qg (default) or nonlinear")
    ap.add_argument("--floor", action="store_true",
                    help="nonlinear balance: accept the floor remedy where PV or absolute vorticity has the wrong sign")
    ap.add_argument("--headline", help="one-line headline on the title page (plain text)")
    text = ap.add_mutually_exclusive_group()
    text.add_argument("--summary", help="free-text summary in a box on the title page (plain text)")
    text.add_argument("--summary-file", metavar="FILE", help="read the summary from a UTF-8 text file")
    ap.add_argument("--author", help="forecaster's name on the title page")
    ap.add_argument("--office", help="forecaster's office on the title page")
    ap.add_argument("--pages", metavar="LIST",
                    help=f"pages after the title page, in order, comma-separated from {','.join(PAGES)} "
                         "(default: all but balance and tendency; balance with --balance nonlinear, "
                         "tendency with --tendency)")
    args = ap.parse_args(argv)
    if args.floor and args.balance != "nonlinear":
        ap.error("--floor applies to --balance nonlinear only")
    try:
        summary = args.summary
        if args.summary_file is not None:
            try:
                summary = Path(args.summary_file).expanduser().read_text(encoding="utf-8")
            except (OSError, UnicodeDecodeError) as exc:
                raise InputError(f"--summary-file {args.summary_file!r} cannot be read as UTF-8 text: "
                                 f"{cli.one_line(exc)}") from None
        texts = briefing_texts(args.headline, summary, args.author, args.office)
        order = briefing_pages(args.pages, args.tendency, args.balance)
        from workbench.analysis import default_case_path
        from workbench.io import open_case

        cli.check_output(args.output, args.overwrite, suffixes=(".pdf",), what="briefing")
        if args.session is not None and not Path(args.session).expanduser().is_file():
            raise ExportError(f"--session {args.session!r} is not a file; give a session saved from the workbench")
        case = open_case(cli.case_source(args.case) or default_case_path(), **cli.selection_options(args))
        cli.check_inversion_domain(case)  # a domain reaching the equator: refused before any work
        session = args.session
        if session and args.accept_modified_session:
            from workbench.session import load_session

            session = load_session(session, case=case, accept_modified=True)
        bar = cli.progress(desc="briefing", unit="page", enabled=False if args.quiet else None)
        try:
            out = make_briefing(case, session, args.output, overwrite=args.overwrite,
                                progress=lambda f, t: bar.update(1), tendency=args.tendency,
                                balance=args.balance, floor=args.floor, pages=order, **texts)
        finally:
            bar.close()
    except WorkbenchError as exc:
        print(f"pvwb brief: error: {cli.one_line(exc)}", file=sys.stderr)
        return 2
    print(f"briefing written to {out}. {CAUTION}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
