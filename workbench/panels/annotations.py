"""The annotation panel: text and colour of the next label or highlighted region, label the
last clicked point, delete the last / all, and the list of annotations (escaped text)."""
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
        self.watch(lambda *ev: self.refresh(), ["annotations"])
        self.refresh()
        return [help_md, self.label_text,
                pn.FlexBox(self.ann_colour, self.label_click_button),
                pn.FlexBox(self.undo_ann_button, self.clear_ann_button), self.ann_list]

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
