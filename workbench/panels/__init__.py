"""The page's panels, each on the shared :class:`~workbench.state.State` alone.

Every panel takes the State and nothing else, watches only the State parameters it shows,
updates its plots' data in place, and displays by itself in a notebook::

    import workbench as wb
    from workbench.state import State

    state = State(wb.open_case("sample_cases/skerrywind.nc"))
    wb.panels.MapPanel(state)          # the map alone; lasso with state.page's settings
    wb.panels.AttributionPanel(state)  # in another cell: follows the same State

The full page (:class:`workbench.app.Workbench`) is their layout. Settings of the page's
controls that are not part of a session (mouse mode, next lasso, annotation text, folders)
live on ``state.page`` (:class:`~workbench.state.PageChoices`).
"""
from .annotations import AnnotationPanel
from .attribution import AttributionPanel
from .base import StatePanel, offline_extension
from .compare import ComparePanel
from .controls import CaseControls
from .export import ExportPanel
from .map import MapPanel
from .overlay import OverlayPanel
from .pieces import LassoPanel, PiecesPanel
from .section import SectionPanel
from .sessions import SessionPanel
from .status import FilePanel, StatusPanel
from .whatif import WhatIfPanel

__all__ = ["StatePanel", "CaseControls", "MapPanel", "SectionPanel", "LassoPanel",
           "PiecesPanel", "AttributionPanel", "AnnotationPanel", "ExportPanel", "SessionPanel",
           "StatusPanel", "FilePanel", "offline_extension", "OverlayPanel", "ComparePanel",
           "WhatIfPanel"]
