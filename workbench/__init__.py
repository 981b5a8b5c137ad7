"""PV Workbench: potential-vorticity diagnosis of storms.

Open a pressure-level analysis with :func:`open_case`, map PV on isentropic surfaces and the
dynamic tropopause, invert QG PV anomalies piece by piece, and brief. The interactive
:class:`Workbench` (Panel) is imported on first use so that computation never pulls in
plotting or widget libraries.
"""

__version__ = "0.1.0"



def _import_units():
    """Import :mod:`workbench.units` (MetPy's registry, PVU) without importing matplotlib.

    MetPy's unit registry switches on pint's matplotlib support when it is built, which imports
    matplotlib into every process (computation commands included). That one call is skipped while
    MetPy is first imported here; nothing in the package draws pint quantities (views draw plain
    arrays). Call ``workbench.units.units.setup_matplotlib()`` to switch it on when needed.
    """
    import sys

    if "metpy.units" in sys.modules:
        from . import units  # noqa: F401
        return
    import pint

    cls = pint.UnitRegistry
    real = cls.__dict__.get("setup_matplotlib")
    if real is not None:
        cls.setup_matplotlib = lambda self, enable=True: None
    try:
        from . import units  # noqa: F401  (registers PVU)
    finally:
        if real is not None:
            cls.setup_matplotlib = real


_import_units()
from .case import Case
from .errors import (AccessError, DomainError, FileFormatError, GridError, InputError,  # noqa: F401
                     MissingVariableError, PieceError, SessionError, UnitsError, WorkbenchError)
from .io import open_case

__all__ = ["open_case", "Case", "invert_qgpv", "Piece", "Workbench", "__version__"]


def __getattr__(name):  # lazy: keep `import workbench` light and free of plotting/widgets
    if name == "invert_qgpv":
        from .inversion.fields import invert_qgpv

        return invert_qgpv
    if name == "Piece":
        from .inversion.pieces import Piece

        return Piece
    if name == "Workbench":
        from .app import Workbench

        return Workbench
    if name == "State":
        from .state import State

        return State
    if name == "panels":  # the page's panels (wb.panels.MapPanel(state))
        import importlib

        return importlib.import_module(".panels", __name__)
    raise AttributeError(f"module 'workbench' has no attribute {name!r}")
