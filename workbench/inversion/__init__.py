"""QG potential-vorticity inversion: operator, fast solver, balanced fields, pieces, QG omega.

No plotting and no widgets here.  See DEVELOPERS.md ("QG discretisation").
"""
from workbench.inversion.operator import QGGrid, apply_qg_operator, assemble_operator
from workbench.inversion.solver import QGSolver, clear_solver_cache, get_solver

__all__ = ["QGGrid", "apply_qg_operator", "assemble_operator", "QGSolver", "get_solver", "clear_solver_cache"]
