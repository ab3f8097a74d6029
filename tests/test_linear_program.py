"""pipeline.methods.linear_program against scipy.optimize.linprog (the reference library).

Random programs of the audit's shape (equality rows with ±1 entries, boxed columns holding a
feasible point): the optimum and the optimal point's feasibility are checked against linprog's,
for one-off programs and for one program re-solved with one objective after another (the warm
starts must give what a fresh solve gives). The row duals must certify the optimum (weak duality
bound equal to the objective), which is what the audit's cuts rely on."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse
from scipy.optimize import linprog

from pipeline.methods.linear_program import LinearProgram


def _program(seed: int, n_rows: int = 30, n_cols: int = 80):
    rng = np.random.default_rng(seed)
    A = sparse.random(n_rows, n_cols, density=0.08, random_state=seed, format="csr")
    A.data = np.where(A.data > 0.5, 1.0, -1.0)
    point = rng.uniform(0, 10, n_cols)           # a feasible point, as the true values are
    b = A @ point
    lower = point - rng.uniform(0, 5, n_cols)
    upper = point + rng.uniform(0, 5, n_cols)
    return A, b, lower, upper, rng


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("warm", [False, True])
def test_optimum_matches_scipy_linprog(seed, warm):
    A, b, lower, upper, rng = _program(seed)
    program = LinearProgram(A, b, b, lower, upper, warm=warm)
    for _ in range(5):  # the same program, one objective after another
        cost = rng.normal(size=A.shape[1])
        ours = program.minimise(cost)
        ref = linprog(cost, A_eq=A, b_eq=b, bounds=np.column_stack([lower, upper]), method="highs")
        assert ours.optimal and ref.status == 0
        assert cost @ ours.x == pytest.approx(ref.fun, rel=1e-9, abs=1e-7)
        assert np.abs(A @ ours.x - b).max() < 1e-7
        assert np.all(ours.x >= lower - 1e-9) and np.all(ours.x <= upper + 1e-9)


@pytest.mark.parametrize("seed", range(4))
def test_one_cell_after_another_matches_scipy_linprog(seed):
    """The audit's use: maximise and minimise one column after another, a single ±1 cost moving
    between columns and coming back to earlier ones (only changed costs are passed to HiGHS)."""
    A, b, lower, upper, rng = _program(seed)
    program = LinearProgram(A, b, b, lower, upper, warm=True)
    columns = rng.choice(A.shape[1], 6, replace=False)
    for j in [*columns, *columns[:3]]:
        for sign in (-1.0, 1.0):
            cost = np.zeros(A.shape[1])
            cost[j] = sign
            ours = program.minimise(cost)
            ref = linprog(cost, A_eq=A, b_eq=b, bounds=np.column_stack([lower, upper]), method="highs")
            assert ours.optimal and ref.status == 0
            assert ours.x[j] == pytest.approx(ref.x[j], rel=1e-9, abs=1e-7)


@pytest.mark.parametrize("seed", range(4))
def test_row_duals_certify_the_optimum(seed):
    """Weak duality: for any ν, min c·x >= ν·b + Σ_j min over the box of (c − Aᵀν)_j x_j; at the
    optimal duals the bound equals the optimum (one sign convention or the other: the audit
    tries both, so here one of them must close the gap)."""
    A, b, lower, upper, rng = _program(seed)
    cost = rng.normal(size=A.shape[1])
    solution = LinearProgram(A, b, b, lower, upper).minimise(cost)
    optimum = cost @ solution.x
    bounds = []
    for nu in (solution.row_dual, -solution.row_dual):
        reduced = cost - A.T @ nu
        bounds.append(nu @ b + np.where(reduced > 0, reduced * lower, reduced * upper).sum())
    assert max(bounds) == pytest.approx(optimum, rel=1e-7, abs=1e-6)
    assert all(bound <= optimum + 1e-6 for bound in bounds)  # both are valid lower bounds


def test_inequality_rows_and_unbounded_columns():
    # min −x − y subject to x + y <= 4, x − y = 0, x, y >= 0: x = y = 2 (worked by hand)
    A = sparse.csr_matrix([[1.0, 1.0], [1.0, -1.0]])
    program = LinearProgram(A, [-np.inf, 0.0], [4.0, 0.0], [0.0, 0.0], [np.inf, np.inf])
    solution = program.minimise([-1.0, -1.0])
    assert solution.optimal and solution.x == pytest.approx([2.0, 2.0])
    # without the first row nothing stops x = y from growing
    unbounded = LinearProgram(A[1:], [0.0], [0.0], [0.0, 0.0], [np.inf, np.inf], warm=True).minimise([-1.0, -1.0])
    assert unbounded.status in ("unbounded", "unbounded or infeasible") and unbounded.x is None


@pytest.mark.parametrize("seed", range(4))
def test_integer_columns_match_scipy_milp(seed):
    """A small covering program like the choice of cells to hide (every row needs at least its
    right-hand side from the columns in it): HiGHS's branch and cut here against scipy's milp, and
    the integer optimum above the relaxation's, so the integrality did reach the solver."""
    from scipy.optimize import Bounds, LinearConstraint, milp
    rng = np.random.default_rng(seed)
    A = (rng.random((12, 15)) < 0.3).astype(float)
    A[np.arange(12), rng.integers(0, 15, 12)] = 1.0          # every row can be covered
    rhs = np.full(12, 1.5)                                   # each row needs two columns
    A[A.sum(axis=1) < 2, :2] = 1.0
    cost = rng.uniform(1.0, 4.0, 15)
    ours = LinearProgram(A, rhs, np.full(12, np.inf), np.zeros(15), np.ones(15), integer=np.ones(15, bool),
                         relative_gap=1e-9).minimise(cost)
    ref = milp(cost, constraints=LinearConstraint(A, rhs, np.inf), integrality=np.ones(15), bounds=Bounds(0, 1))
    relaxed = LinearProgram(A, rhs, np.full(12, np.inf), np.zeros(15), np.ones(15)).minimise(cost)
    assert ours.optimal and ref.status == 0
    assert cost @ ours.x == pytest.approx(ref.fun, rel=1e-9)
    assert np.allclose(ours.x, np.round(ours.x), atol=1e-9)
    assert cost @ relaxed.x < ref.fun - 1e-6


def test_errors_name_the_argument_and_shapes():
    A = sparse.csr_matrix(np.ones((2, 3)))
    with pytest.raises(ValueError, match=r"col_upper has shape \(2,\); the matrix \(2, 3\) needs \(3,\)"):
        LinearProgram(A, [0, 0], [0, 0], [0, 0, 0], [1, 1])
    program = LinearProgram(A, [0, 0], [1, 1], [0, 0, 0], [1, 1, 1])
    with pytest.raises(ValueError, match=r"cost has shape \(2,\); the program has 3 columns"):
        program.minimise([1.0, 2.0])


def test_solving_prints_nothing(capfd):
    """The CLI's output must not carry the solver's banner or log."""
    A = sparse.csr_matrix([[1.0, -1.0]])
    LinearProgram(A, [0.0], [0.0], [0.0, 0.0], [1.0, 1.0], warm=True).minimise([-1.0, 0.0])
    out, err = capfd.readouterr()
    assert out == "" and err == ""
