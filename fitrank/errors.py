"""Typed errors. Each carries a one-line message a user can act on.

The CLI turns :class:`FitrankInputError` (and its subclasses) and
:class:`ConvergenceError` into one line on stderr and exit code 2, with no
traceback. Errors whose constructor takes more than the message pickle by
their constructor's arguments, so one raised in a worker process (snapshot
solves on an executor) arrives whole instead of breaking the pool.
"""

from __future__ import annotations


class FitrankInputError(ValueError):
    """Bad input data or settings; the message names the file/row/key and the fix."""


class DataError(FitrankInputError):
    """A problem in an input table: names the file, the 1-based row and the problem."""

    def __init__(self, path, problem: str, row: int | None = None, column: str | None = None):
        where = str(path)
        if row is not None:
            where += f", row {row}"
        if column is not None:
            where += f", column '{column}'"
        super().__init__(f"{where}: {problem}")
        self.path, self.row, self.column, self.problem = path, row, column, problem

    def __reduce__(self):
        return type(self), (self.path, self.problem, self.row, self.column)


class ConfigError(FitrankInputError):
    """A problem in a TOML config or a --set override: names the key."""

    def __init__(self, key: str, problem: str, source: str | None = None):
        where = f"{source}: " if source else ""
        super().__init__(f"{where}config key '{key}': {problem}")
        self.key, self.problem, self.source = key, problem, source

    def __reduce__(self):
        return type(self), (self.key, self.problem, self.source)


class ModelMismatchError(FitrankInputError):
    """A saved reduced model does not belong to the data/settings it is loaded against."""


class ConvergenceError(RuntimeError):
    """An iterative solver stopped before reaching its tolerance.

    Attributes:
      iterations: iterations (mat-vecs) spent.
      residual: final ||M x - (1 - alpha) v||_1.
      bound: certified ||x - x_true||_1 <= bound.
    """

    def __init__(self, what: str, iterations: int, residual: float, bound: float, tol: float):
        super().__init__(
            f"{what} did not converge: {iterations} iterations, residual {residual:.3e}, "
            f"certified L1 error bound {bound:.3e} > tol {tol:.1e}; raise maxiter or loosen tol"
        )
        self.what, self.iterations, self.residual, self.bound, self.tol = what, iterations, residual, bound, tol

    def __reduce__(self):
        return type(self), (self.what, self.iterations, self.residual, self.bound, self.tol)
