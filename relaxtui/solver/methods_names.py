"""Names of the solution methods, importable without numba (for --help).

The registry with each method's set-up is ``relaxtui.solver.methods``.
"""

METHOD_NAMES = ("jacobi", "gauss-seidel", "sor", "red-black-sor", "multigrid")
