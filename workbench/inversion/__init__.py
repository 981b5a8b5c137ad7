"""QG potential-vorticity inversion: operator, fast solver, balanced fields, pieces, QG omega.

No plotting and no widgets here.  See DEVELOPERS.md ("QG discretisation", "Inversion layer").
Submodules ``fields``, ``pieces`` and ``omega`` are imported on first use of their names.
"""
from workbench.inversion.operator import QGGrid, apply_qg_operator, assemble_operator
from workbench.inversion.solver import QGSolver, SeparableSolver, clear_solver_cache, get_solver

__all__ = [
    "QGGrid", "apply_qg_operator", "assemble_operator", "QGSolver", "SeparableSolver", "get_solver",
    "clear_solver_cache", "balanced_fields", "invert_qgpv", "Piece", "invert_pieces", "attribution",
    "piece_mask", "piece_forcing", "qg_omega", "piece_omega", "invert_nonlinear_pieces", "balance_quality",
]

_LAZY = {
    "balanced_fields": "fields", "invert_qgpv": "fields",
    "Piece": "pieces", "invert_pieces": "pieces", "attribution": "pieces", "piece_mask": "pieces",
    "piece_forcing": "pieces",
    "qg_omega": "omega", "piece_omega": "omega",
    "invert_nonlinear_pieces": "nonlinear", "balance_quality": "nonlinear",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f"workbench.inversion.{_LAZY[name]}"), name)
    raise AttributeError(f"module 'workbench.inversion' has no attribute {name!r}")
