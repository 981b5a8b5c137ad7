"""The section panel: the active section line's cross-section (figures built once per case,
their data replaced in place)."""
from __future__ import annotations

from .base import StatePanel

__all__ = ["SectionPanel"]


class SectionPanel(StatePanel):
    """:class:`~workbench.views.interactive.SectionView` on the State. The section waits for
    the next tick when served, so the map's overlay reaches the browser first."""

    def __init__(self, state, width=820):
        self.width = width
        self.view = None
        super().__init__(state)

    def build(self):
        from ..views.interactive import SectionView

        if self.view is not None:
            self.view.detach()
            self.view = None
        if self.state.case is None:
            return []
        self.view = SectionView(self.state, width=self.width, defer=self.later)
        return [self.view.pane]

    @property
    def pane(self):
        return self.view.pane if self.view is not None else self.layout

    def detach(self, keep_case=False):
        super().detach(keep_case)
        if not keep_case and self.view is not None:
            self.view.detach()
