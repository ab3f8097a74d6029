"""Linear and mixed-integer programs through HiGHS; a linear program is held open between solves.

    program = LinearProgram(A, row_lower, row_upper, col_lower, col_upper, warm=True)
    solution = program.minimise(cost)      # again and again with other costs

min c·x subject to row_lower <= A x <= row_upper and col_lower <= x <= col_upper, solved by HiGHS
(Huangfu & Hall 2018, Math. Prog. Comp. 10:119) through its Python binding, highspy. The audit
asks for the min and max of one cell after another over the same linked component: only the
objective changes, so the last optimal basis stays primal feasible and the primal simplex goes on
from it in a few pivots (`warm=True`), where scipy.optimize.linprog would build and solve each
program from scratch. One-off programs (`warm=False`) use HiGHS's default (dual) simplex. With
`integer` some columns must be whole numbers: a mixed-integer program (the choice of complementary
cells), solved by HiGHS's branch and cut with its presolve.

The raw binding (`highspy._Highs`) is used rather than `highspy.Highs`: the latter registers a
Python callback on every instance, which prints a banner on standard output and calls back into
Python during solves.
"""

from __future__ import annotations

from dataclasses import dataclass

import highspy
import numpy as np
from scipy import sparse

__all__ = ["LinearProgram", "Solution"]

# HiGHS's simplex_strategy option: 4 = primal simplex (kSimplexStrategyPrimal)
_PRIMAL_SIMPLEX = 4
# passModel's codes: the matrix given column by column (MatrixFormat.kColwise), minimise (ObjSense)
_COLUMN_WISE = int(highspy.MatrixFormat.kColwise)
_MINIMISE = int(highspy.ObjSense.kMinimize)


@dataclass(frozen=True)
class Solution:
    """status: 'optimal', 'infeasible', 'unbounded', 'unbounded or infeasible' (HiGHS stopped
    without telling which; a caller that knows a feasible point knows it is unbounded), 'time limit
    reached' or HiGHS's words for anything else; x and row_dual (the
    multipliers of the rows, HiGHS's sign convention) only when optimal."""

    status: str
    x: np.ndarray | None = None
    row_dual: np.ndarray | None = None

    @property
    def optimal(self) -> bool:
        return self.status == "optimal"


class LinearProgram:
    """One HiGHS model kept between solves (not thread-safe: one per thread)."""

    def __init__(self, A, row_lower, row_upper, col_lower, col_upper, *, warm: bool = False,
                 integer=None, time_limit: float | None = None, relative_gap: float | None = None):
        """`warm`: solved again and again with other costs (primal simplex from the last basis).
        `integer`: a mask of the columns that must take integer values (a mixed-integer program,
        solved by HiGHS's branch and cut within `time_limit` seconds to `relative_gap`)."""
        A = sparse.csc_matrix(A, dtype=np.float64)
        n_rows, n_cols = A.shape
        arrays = {"row_lower": (row_lower, n_rows), "row_upper": (row_upper, n_rows),
                  "col_lower": (col_lower, n_cols), "col_upper": (col_upper, n_cols)}
        for name, (values, size) in arrays.items():
            if np.shape(values) != (size,):
                raise ValueError(f"{name} has shape {np.shape(values)}; the matrix {A.shape} needs ({size},)")
        self.n_cols = n_cols
        if integer is not None:
            integer = np.asarray(integer, dtype=bool)
            if integer.shape != (n_cols,):
                raise ValueError(f"integer has shape {integer.shape}; the matrix {A.shape} needs ({n_cols},)")
        h = self._highs = highspy._Highs()
        h.setOptionValue("output_flag", False)
        # the binding's array form of passModel: building a HighsLp field by field took five times
        # as long (its vectors are converted one by one)
        status = h.passModel(n_cols, n_rows, A.nnz, _COLUMN_WISE, _MINIMISE, 0.0, np.zeros(n_cols),
                             np.asarray(col_lower, dtype=np.float64), np.asarray(col_upper, dtype=np.float64),
                             np.asarray(row_lower, dtype=np.float64), np.asarray(row_upper, dtype=np.float64),
                             A.indptr.astype(np.int32), A.indices.astype(np.int32), A.data,
                             np.zeros(n_cols, dtype=np.int32) if integer is None else integer.astype(np.int32))
        if status == highspy.HighsStatus.kError:
            raise ValueError("HiGHS refused the linear program (check the bounds: lower <= upper, no NaN)")
        self._cost = np.zeros(n_cols)  # the costs HiGHS holds (passModel set them to 0)
        if integer is not None:
            if relative_gap is not None:
                h.setOptionValue("mip_rel_gap", float(relative_gap))
        else:
            # presolve would rebuild the program on every solve and lose the basis between them
            h.setOptionValue("presolve", "off")
        if warm:
            h.setOptionValue("simplex_strategy", _PRIMAL_SIMPLEX)
        if time_limit is not None:
            h.setOptionValue("time_limit", max(float(time_limit), 0.01))

    def minimise(self, cost) -> Solution:
        cost = np.asarray(cost, dtype=np.float64)
        if cost.shape != (self.n_cols,):
            raise ValueError(f"cost has shape {cost.shape}; the program has {self.n_cols} columns")
        h = self._highs
        # only the costs that changed: the audit moves a single 1 from cell to cell
        changed = np.flatnonzero(cost != self._cost).astype(np.int32)
        if len(changed):
            h.changeColsCost(len(changed), changed, cost[changed])
            self._cost = cost.copy()
        h.run()
        status = h.getModelStatus()
        if status == highspy.HighsModelStatus.kOptimal:
            solution = h.getSolution()
            return Solution("optimal", np.array(solution.col_value), np.array(solution.row_dual))
        if status == highspy.HighsModelStatus.kTimeLimit:
            return Solution("time limit reached")
        if status == highspy.HighsModelStatus.kInfeasible:
            return Solution("infeasible")
        if status == highspy.HighsModelStatus.kUnbounded:
            return Solution("unbounded")
        if status == highspy.HighsModelStatus.kUnboundedOrInfeasible:
            return Solution("unbounded or infeasible")  # the caller may know a feasible point
        return Solution(h.modelStatusToString(status))
