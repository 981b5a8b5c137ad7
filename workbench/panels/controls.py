"""Case and time controls: valid time (with step buttons, a play/pause loop at a chosen rate
and the ← → keys), surface, field, tropopause threshold, reference state, balanced-flow level,
what the mouse does on the map, and undo/redo (buttons and Ctrl+Z / Ctrl+Shift+Z).

The page's keys come from :class:`KeyBindings`, a small JavaScript component (shipped inline
with the page, nothing fetched) that listens to ``keydown`` on the document and reports the
keys it handles; keys typed into a text box, number box or list stay with that widget."""
from __future__ import annotations

import time

import numpy as np
import panel as pn
import param
from panel.custom import JSComponent

from ..state import REFERENCE_KINDS
from .base import StatePanel, rule

__all__ = ["CaseControls", "MODE_LABELS", "KeyBindings", "KEYS"]

#: Mouse modes of the map: label -> PageChoices.mouse_mode
MODE_LABELS = {"Pan / zoom": "pan", "Lasso a piece": "lasso", "Draw a section": "section",
               "Pick target point": "target", "Place a label": "label",
               "Edit piece outlines": "edit", "Move annotations": "move",
               "Draw an arrow (click tail, then head)": "arrow"}

#: What the page's keys do (the key names KeyBindings reports -> meaning)
KEYS = {"ArrowLeft": "previous time", "ArrowRight": "next time", "Ctrl+z": "undo",
        "Ctrl+Shift+z": "redo", "Ctrl+y": "redo", "Escape": "cancel the lasso being drawn",
        "Delete": "delete the selected piece or annotation"}


class KeyBindings(JSComponent):
    """Reports the page's keys (:data:`KEYS`) as ``press`` = ``"<count>:<key>"`` (the count
    makes a repeated key a new value). Typing in an input, text area or list is left alone.
    Escape while the mouse button is held also clears the map's lasso outline in the browser
    (the lasso then ends with no outline and makes nothing)."""

    press = param.String(default="")
    tidy = param.Integer(default=0, doc="Raised after panels were rebuilt: the browser's "
                                        "documents recompute their model index.")

    _esm = """
export function render({ model, el }) {
  // BokehJS keeps models replaced by the server in its documents' model index until the index
  // is recomputed: old figures (and their data) would stay in memory and be found by name
  model.on("tidy", () => {
    for (const doc of (window.Bokeh ? window.Bokeh.documents : [])) {
      if (typeof doc._recompute_all_models === "function") doc._recompute_all_models();
    }
  });
  let count = 0;
  let down = false;
  const typing = (ev) => {
    const t = (ev.composedPath && ev.composedPath()[0]) || ev.target;
    const tag = ((t && t.tagName) || "").toLowerCase();
    return tag === "input" || tag === "textarea" || tag === "select" || (t && t.isContentEditable);
  };
  const onDown = () => { down = true; };
  const onUp = () => { down = false; };
  const onKey = (ev) => {
    if (typing(ev)) return;
    const ctrl = ev.ctrlKey || ev.metaKey;
    let key = null;
    if (ctrl && (ev.key === "z" || ev.key === "Z")) key = ev.shiftKey ? "Ctrl+Shift+z" : "Ctrl+z";
    else if (ctrl && (ev.key === "y" || ev.key === "Y")) key = "Ctrl+y";
    else if (!ctrl && !ev.altKey && ["ArrowLeft", "ArrowRight", "Escape", "Delete"].includes(ev.key)) key = ev.key;
    if (key === null) return;
    ev.preventDefault();
    if (key === "Escape" && down && window.Bokeh) {
      for (const doc of window.Bokeh.documents) {
        let tool = null;
        try {
          tool = doc.get_model_by_name("pvwb-lasso");
        } catch (e) {  // an old map's tool still indexed: recompute the index, then look again
          if (typeof doc._recompute_all_models === "function") doc._recompute_all_models();
          try { tool = doc.get_model_by_name("pvwb-lasso"); } catch (e2) { tool = null; }
        }
        if (tool && tool.overlay) tool.overlay.update({xs: [], ys: []});
      }
    }
    count += 1;
    model.press = count + ":" + key;
  };
  document.addEventListener("keydown", onKey, true);
  document.addEventListener("pointerdown", onDown, true);
  document.addEventListener("pointerup", onUp, true);
  model.on("remove", () => {
    document.removeEventListener("keydown", onKey, true);
    document.removeEventListener("pointerdown", onDown, true);
    document.removeEventListener("pointerup", onUp, true);
  });
  const span = document.createElement("span");
  span.style.display = "none";
  return span;
}
"""
_REFERENCE_LABELS = {"time mean": "time_mean", "area mean": "area_mean",
                     "zonal mean": "zonal_mean"}


def surface_options(case):
    """``{label: surface}``: the dynamic tropopause, isentropic surfaces every 5 K over the
    case's range, and its pressure levels."""
    opts = {"dynamic tropopause": "tropopause"}
    th = case.theta()
    lo = float(np.nanpercentile(th.isel(pressure=0).values, 5))
    hi = float(np.nanpercentile(th.isel(pressure=-1).values, 50))
    for k in np.arange(5 * np.ceil(lo / 5), min(hi, 420) + 1e-6, 5):
        opts[f"θ = {k:g} K"] = float(k)
    for p in case.levels_hpa:
        opts[f"{p:g} hPa"] = f"{p:g}hPa"
    return opts


class CaseControls(StatePanel):
    """Time, surface, field, tropopause threshold, reference state, balanced-flow level and
    mouse mode. Widgets write to the State; the State's changes come back to the widgets
    (watching time_index, surface, field, threshold, reference, overlay_level only)."""

    def build(self):
        from ..views.interactive import FIELD_LABELS

        st = self.state
        case = st.case
        if case is None:
            return []
        # wide enough for "2051-02-10 12:00 UTC" with both step buttons in the 280 px sidebar
        self.time = pn.widgets.Select(label="Valid time", value=st.time_index, width=184,
                                      margin=(5, 4, 5, 10),
                                      options={lab: i for i, lab in enumerate(st.time_labels)})
        self.prev_t = pn.widgets.Button(label="◀", width=34, margin=(23, 2, 5, 2))
        self.next_t = pn.widgets.Button(label="▶", width=34, margin=(23, 2, 5, 2))
        self.prev_t.on_click(lambda e: self.step_time(-1))
        self.next_t.on_click(lambda e: self.step_time(+1))
        sopts = surface_options(case)
        if st.surface not in sopts.values():
            thetas = [v for v in sopts.values() if isinstance(v, float)]
            if thetas and isinstance(st.surface, float):
                st.surface = min(thetas, key=lambda v: abs(v - st.surface))
            else:
                from ..state import surface_label

                sopts[surface_label(st.surface, st.threshold)] = st.surface
        self.surface = pn.widgets.Select(label="Surface", options=sopts, value=st.surface,
                                         width=250)

        def field_options():
            return {f"{FIELD_LABELS[f][0]} ({FIELD_LABELS[f][1]})": f
                    for f in st.available_fields()}

        self.field = pn.widgets.Select(label="Field", value=st.field, width=250,
                                       options=field_options())
        self.level = pn.widgets.Select(label="Balanced-flow level", width=120,
                                       options={f"{p:g} hPa": float(p) for p in case.levels_hpa},
                                       value=float(st.overlay_level))
        self.reference = pn.widgets.Select(
            label="Reference state", width=250, options=_REFERENCE_LABELS,
            value=st.reference if st.reference in REFERENCE_KINDS else
            getattr(case, "default_reference", "time_mean"))
        self.threshold = pn.widgets.FloatInput(label="Tropopause threshold (PVU)", value=st.threshold,
                                               step=0.5, start=0.5, end=10, width=250)
        self.mode = pn.widgets.RadioButtonGroup(
            label="Mouse", options=list(MODE_LABELS), orientation="vertical", width=250,
            value={v: k for k, v in MODE_LABELS.items()}[st.page.mouse_mode],
            css_classes=["pvwb-mode"])
        links = ((self.time, "time_index"), (self.surface, "surface"), (self.field, "field"),
                 (self.level, "overlay_level"), (self.reference, "reference"),
                 (self.threshold, "threshold"))
        for w, name in links:
            self.watch(lambda ev, n=name: setattr(st, n, ev.new), ["value"], obj=w)
            self.watch(lambda *ev, w=w, n=name: self.to_widget(w, getattr(st, n)), [name])

        def surface_changed(*_):
            opts = field_options()
            if opts != self.field.options:
                self.field.param.update(options=opts, value=st.field)
            if st.surface not in self.surface.options.values():
                from ..state import surface_label

                self.surface.options = {**self.surface.options,
                                        surface_label(st.surface, st.threshold): st.surface}
                self.to_widget(self.surface, st.surface)

        self.watch(surface_changed, ["surface", "field"])
        self.watch(lambda ev: setattr(st.page, "mouse_mode", MODE_LABELS[ev.new]), ["value"],
                   obj=self.mode)
        self.watch(lambda *ev: self.to_widget(self.mode, {v: k for k, v in MODE_LABELS.items()}
                                              [st.page.mouse_mode]), ["mouse_mode"], obj=st.page)
        self.map_projection = pn.widgets.RadioButtonGroup(
            label="Map drawn in", width=250, value=st.page.map_projection,
            options={"its own projection": "native", "lon–lat": "lonlat"},
            visible=bool(case.data.attrs.get("native_crs")), css_classes=["pvwb-projection"])
        self.watch(lambda ev: setattr(st.page, "map_projection", ev.new), ["value"],
                   obj=self.map_projection)
        time_row = self._build_time_loop()
        return [TextMarkdownOnce("**Map**"), pn.Row(self.time, self.prev_t, self.next_t),
                time_row,
                self.surface, self.field, self.map_projection,
                self.threshold, self.reference,
                rule(),
                TextMarkdownOnce("**Mouse on the map**"), self.mode,
                pn.Row(self.level)]

    def detach(self, keep_case=False):
        if getattr(self, "_loop", None) is not None:
            self._loop.stop()
            self._loop = None
        super().detach(keep_case)

    def step_time(self, step):
        n = len(self.state.case.times)
        self.state.time_index = (self.state.time_index + step) % n

    # ---------------------------------------------------------------- time loop, keys, undo
    def _build_time_loop(self):
        """Play/pause, frames per second, undo/redo buttons and the key listener."""
        pg = self.state.page
        self._loop = None
        self.play = pn.widgets.Toggle(label="▶ Play", width=80, margin=(5, 2, 5, 5),
                                      css_classes=["pvwb-play"])
        self.fps = pn.widgets.FloatInput(label="", value=float(pg.play_fps), start=0.1, end=10.0,
                                         step=0.5, width=60, css_classes=["pvwb-fps"],
                                         margin=(5, 2, 5, 2))
        self.undo_button = pn.widgets.Button(label="↶ Undo (Ctrl+Z)", width=120,
                                             css_classes=["pvwb-undo"], margin=(5, 2, 5, 5))
        self.redo_button = pn.widgets.Button(label="↷ Redo", width=80, css_classes=["pvwb-redo"],
                                             margin=(5, 2, 5, 2))
        self.undo_button.on_click(lambda e: self._guard(self.undo))
        self.redo_button.on_click(lambda e: self._guard(self.redo))
        self.keys = KeyBindings(css_classes=["pvwb-keys"], width=0, height=0, margin=0)
        self.watch(lambda ev: self._play(ev.new), ["value"], obj=self.play)
        self.watch(lambda ev: self._set_fps(ev.new), ["value"], obj=self.fps)
        self.watch(lambda ev: self.key(ev.new.split(":", 1)[-1]), ["press"], obj=self.keys)
        self.watch(lambda *ev: self.later(self._tidy), ["rebuilds"], obj=pg)
        self.watch(lambda *ev: self._history_buttons(), ["undo_steps", "redo_steps"])
        self._history_buttons()
        return pn.Column(
            pn.Row(self.play, self.fps, pn.pane.Markdown("frames/s", margin=(12, 2, 5, 2),
                                                         styles={"font-size": "12px"})),
            pn.Row(self.undo_button, self.redo_button, self.keys), margin=0)

    def _tidy(self):
        self.keys.tidy += 1

    def _set_fps(self, fps):
        if fps is None:
            return
        self.state.page.play_fps = float(fps)
        if self._loop is not None:
            self._loop.period = int(1000.0 / self.state.page.play_fps)

    def _play(self, on):
        """Start (``on``) or stop the time loop (one step per 1/fps s, wrapping round)."""
        if self._loop is not None:
            self._loop.stop()
            self._loop = None
        if on:
            self.play.label = "⏸ Pause"
            self._loop = pn.state.add_periodic_callback(
                lambda: self._guard(self.step_time, +1),
                period=int(1000.0 / self.state.page.play_fps))
        else:
            self.play.label = "▶ Play"

    def _history_buttons(self):
        st = self.state
        self.undo_button.disabled = not st.can_undo
        self.redo_button.disabled = not st.can_redo

    def undo(self):
        t0 = time.perf_counter()
        if not self.state.undo():
            self.state.set_status("Nothing to undo.", "info")
        else:
            self.state.set_status(f"Undone ({time.perf_counter() - t0:.2f} s).", "info")
        self._history_buttons()

    def redo(self):
        t0 = time.perf_counter()
        if not self.state.redo():
            self.state.set_status("Nothing to redo.", "info")
        else:
            self.state.set_status(f"Redone ({time.perf_counter() - t0:.2f} s).", "info")
        self._history_buttons()

    def key(self, name):
        """Do what the page key ``name`` means (:data:`KEYS`)."""
        if name == "ArrowLeft":
            self.step_time(-1)
        elif name == "ArrowRight":
            self.step_time(+1)
        elif name == "Ctrl+z":
            self.undo()
        elif name in ("Ctrl+Shift+z", "Ctrl+y"):
            self.redo()
        elif name == "Delete":
            self.delete_selected()
        elif name == "Escape":
            self.state.set_status("Lasso cancelled." if self.state.page.mouse_mode == "lasso"
                                  else "Escape: nothing to cancel.", "info")

    def delete_selected(self):
        """Delete the piece or annotation selected (``state.page.selected``)."""
        from ..errors import InputError

        st = self.state
        sel = st.page.selected or ""
        kind, _, ident = sel.partition(":")
        if kind == "piece" and ident in st.piece_names:
            st.remove_piece(ident)
            st.set_status(f"Deleted piece {ident!r} (Ctrl+Z brings it back).", "info")
        elif kind == "annotation" and any(a.id == ident for a in st.annotations):
            a = st.remove_annotation(ident)
            st.set_status(f"Deleted the {a.kind} (Ctrl+Z brings it back).", "info")
        else:
            raise InputError("nothing selected to delete: click a piece's row in the list, "
                             "or a label or outline in the edit mode, then press Delete")
        st.page.selected = None


def TextMarkdownOnce(text):
    """A fixed small heading."""
    return pn.pane.Markdown(text, margin=(0, 5))
