"""The annotation panel: text and colour of the next label or highlighted region, label the
last clicked point, delete the last / all, the list of annotations (escaped text), and the
editing of one annotation (its text and colour; picking it also selects it for the Delete
key). Labels, arrows and regions are moved and arrows drawn on the map (mouse modes *Move
annotations* and *Draw an arrow*); every change is one undo step."""
from __future__ import annotations

import panel as pn

from ..errors import InputError
from ..textsafe import escape
from .base import StatePanel

__all__ = ["AnnotationPanel"]


class AnnotationPanel(StatePanel):
    """Watches ``annotations`` (the list) and ``state.page`` label text and colour."""

    def build(self):
        from ..annotations import PALETTE
        from ..views.interactive import TextHTML, TextMarkdown

        st, pg = self.state, self.state.page
        self.label_text = pn.widgets.TextInput(
            label="Label text (also the region's label)", sizing_mode="stretch_width",
            max_width=410, value=pg.label_text,
            placeholder="e.g. L, jet streak, dry intrusion", css_classes=["pvwb-label-text"])
        self.ann_colour = pn.widgets.Select(label="Colour", width=120, value=pg.label_colour,
                                            options=[c for c in PALETTE if c != "white"])
        self.label_click_button = pn.widgets.Button(label="Label the last clicked point",
                                                    width=260, margin=(23, 5, 5, 5),
                                                    css_classes=["pvwb-label-click"])
        self.undo_ann_button = pn.widgets.Button(label="Delete the last one", width=200,
                                                 css_classes=["pvwb-ann-undo"])
        self.clear_ann_button = pn.widgets.Button(label="Delete all annotations", width=200,
                                                  color="danger", variant="outline",
                                                  css_classes=["pvwb-ann-clear"])
        self.label_click_button.on_click(lambda e: self._guard(self.label_last_click))
        self.undo_ann_button.on_click(lambda e: self._guard(self.delete_last_annotation))
        self.clear_ann_button.on_click(lambda e: self._guard(self.delete_all_annotations))
        self.watch(lambda *ev: setattr(pg, "label_text", ev[-1].new or ""),
                   ["value_input", "value"], obj=self.label_text)
        self.watch(lambda ev: setattr(pg, "label_colour", ev.new), ["value"], obj=self.ann_colour)
        self.ann_list = TextHTML("", margin=(0, 8), css_classes=["pvwb-ann-list"],
                                 styles={"font-size": "13px"})
        help_md = TextMarkdown(
            "**Label:** choose *Place a label* under *Mouse on the map*, type the text here and "
            "click the map.  \n**Highlighted region:** set *A lasso makes* to *highlighted "
            "region* and lasso it. Annotations are saved in the session and drawn on the "
            "exported figures and the briefing.", margin=(0, 8), styles={"font-size": "13px"})
        self.pick = pn.widgets.Select(label="Edit annotation", width=200, options={},
                                      css_classes=["pvwb-ann-pick"])
        self.edit_text = pn.widgets.TextInput(label="Its text", width=200,
                                              css_classes=["pvwb-ann-edit-text"])
        self.edit_colour = pn.widgets.Select(label="Its colour", width=120,
                                             options=[c for c in PALETTE if c != "white"])
        self.apply_button = pn.widgets.Button(label="Apply", width=80, margin=(23, 5, 5, 5),
                                              css_classes=["pvwb-ann-apply"])
        self.apply_button.on_click(lambda e: self._guard(self.apply_edit))
        self.watch(lambda ev: self._picked(ev.new), ["value"], obj=self.pick)
        self.watch(lambda *ev: self.refresh(), ["annotations"])
        self.refresh()
        return [help_md, self.label_text,
                pn.FlexBox(self.ann_colour, self.label_click_button),
                pn.FlexBox(self.undo_ann_button, self.clear_ann_button), self.ann_list,
                pn.FlexBox(self.pick, self.edit_text, self.edit_colour, self.apply_button)]

    def refresh(self):
        from ..annotations import PALETTE, Arrow, Label, Region
        from ..views.interactive import lat_label, lon_label

        names = {v: k for k, v in PALETTE.items()}
        rows = []
        for k, a in enumerate(self.state.annotations, 1):
            where = "" if a.space == "map" else f" (on {a.space.replace(':', ' ')})"
            if isinstance(a, Label):
                row = f"{k}. label “{a.text}” at {lon_label(a.lon)} {lat_label(a.lat)}{where}"
            elif isinstance(a, Region):
                lab = f" “{a.label}”" if a.label else ""
                row = (f"{k}. region{lab}, {len(a.polygon)} points, "
                       f"{names.get(a.colour, a.colour)}{where}")
            elif isinstance(a, Arrow):
                row = f"{k}. arrow{' “' + a.text + '”' if a.text else ''}{where}"
            else:
                row = f"{k}. {a.kind}{where}"
            rows.append(f"<div class='pvwb-ann-item'>{escape(row)}</div>")
        self.ann_list.object = ("<b>Annotations</b>" + "".join(rows)) if rows else \
            "<i>No annotations yet.</i>"
        if hasattr(self, "pick"):
            opts = {f"{k}. {a.kind}": a.id for k, a in enumerate(self.state.annotations, 1)}
            keep = self.pick.value if self.pick.value in opts.values() else None
            self.pick.param.update(options=opts, value=keep)
            self._picked(keep)

    def _picked(self, ident):
        """Show the picked annotation's text and colour; select it for the Delete key."""
        from ..annotations import PALETTE, TEXT_FIELD

        a = next((a for a in self.state.annotations if a.id == ident), None)
        if a is None:
            return
        self.state.page.selected = f"annotation:{a.id}"
        self.to_widget(self.edit_text, getattr(a, TEXT_FIELD[a.kind]) or "")
        names = {v: k for k, v in PALETTE.items()}
        colour = names.get(a.colour, a.colour)
        if colour in self.edit_colour.options:
            self.to_widget(self.edit_colour, colour)

    def apply_edit(self):
        """Give the picked annotation the text and colour typed here (one undo step)."""
        from ..annotations import annotations_from_list, edited

        ident = self.pick.value
        if ident is None:
            raise InputError("pick an annotation to edit first")
        text = (self.edit_text.value_input or self.edit_text.value or "").strip()
        out = []
        for a in self.state.annotations:
            if a.id == ident:
                a = edited(a, text=text or None, colour=self.edit_colour.value)
            out.append(a)
        self.state.annotations = annotations_from_list(out)
        self.state.set_status("Annotation edited (Ctrl+Z undoes).", "success")

    def _text(self):
        return (self.label_text.value_input or self.label_text.value or "").strip()

    def label_last_click(self):
        from .map import label_last_click

        self.state.page.label_text = self._text()
        return label_last_click(self.state)

    def delete_last_annotation(self):
        a = self.state.remove_annotation(-1)
        what = getattr(a, "text", None) or getattr(a, "label", None) or ""
        self.state.set_status(f"Deleted the {a.kind}{' “' + what + '”' if what else ''}.",
                              "info")

    def delete_all_annotations(self):
        n = self.state.clear_annotations()
        if not n:
            raise InputError("there are no annotations to delete")
        self.state.set_status(f"Deleted {n} annotation(s).", "info")
