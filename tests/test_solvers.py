"""The batch solvers of models.numerics against numpy's LAPACK solve and closed forms:
sparse elimination over a batch (solve_structured), and the working set of the Newton and
bracketed solvers (finished elements leave the set without changing anyone's answer)."""
from __future__ import annotations

import numpy as np

from models.numerics.linear import dense, solve_structured
from models.numerics.roots import newton, solve_bracketed

# The structure of the floating loop's Kirchhoff Jacobian, transposed (the adjoint solves
# with it): 7 unknowns, 19 structural non-zeros, and a zero where natural-order elimination
# would take its last pivot.
PATTERN = [(0, 0), (0, 6), (1, 1), (1, 0), (0, 1), (2, 2), (3, 2), (3, 3), (1, 3), (0, 3),
           (4, 4), (5, 4), (5, 5), (0, 5), (1, 5), (6, 1), (2, 0), (4, 1), (6, 0)]


def random_batch(m, seed, pattern=PATTERN):
    rng = np.random.default_rng(seed)
    entries = {key: rng.uniform(0.5, 2.0, m) * rng.choice([-1.0, 1.0]) for key in pattern}
    for i in range(7):  # a dominant diagonal where the pattern has one, so the systems are regular
        if (i, i) in entries:
            entries[i, i] = entries[i, i] + np.sign(entries[i, i]) * 4.0
    rhs = {0: rng.normal(size=m), 3: rng.normal(size=m)}
    return entries, rhs


def lapack(entries, rhs, k, m):
    b = np.zeros((m, k))
    for row, v in rhs.items():
        b[:, row] = v
    return np.linalg.solve(dense(entries, k, m), b[:, :, None])[:, :, 0].T


def test_structured_solve_matches_lapack():
    entries, rhs = random_batch(2000, seed=1)
    x, ok = solve_structured(entries, rhs, 7, 2000)
    assert ok.all()
    # Both are backward-stable solves of well-conditioned 7x7 systems: agreement to 1e-12.
    np.testing.assert_allclose(x, lapack(entries, rhs, 7, 2000), rtol=1e-12, atol=1e-12)


def test_structured_solve_carries_a_single_right_hand_side_row_into_the_others():
    # A full 5x5 pattern with the right-hand side in one row only: elimination must carry
    # that row's value into rows that had none (the fill of b, as in the adjoint solves,
    # whose right-hand side is the gradient of Iq alone).
    m, k = 300, 5
    rng = np.random.default_rng(7)
    entries = {(i, j): rng.uniform(0.5, 2.0, m) + (4.0 if i == j else 0.0) for i in range(k) for j in range(k)}
    for row in range(k):
        rhs = {row: rng.normal(size=m)}
        x, ok = solve_structured(entries, rhs, k, m)
        assert ok.all()
        # Backward-stable solves of diagonally dominant systems: 1e-12.
        np.testing.assert_allclose(x, lapack(entries, rhs, k, m), rtol=1e-12, atol=1e-12)


def test_structured_solve_pivots_off_a_zero_diagonal():
    # [[0, a], [b, c]] x = [1, 0]: natural order would divide by zero; x = [-c/(a b), 1/a].
    m = 50
    a, b, c = np.linspace(1, 2, m), np.linspace(-3, -1, m), np.linspace(0.5, 5, m)
    x, ok = solve_structured({(0, 1): a, (1, 0): b, (1, 1): c}, {0: np.ones(m)}, 2, m)
    assert ok.all()
    np.testing.assert_allclose(x[0], -c / (a * b), rtol=1e-14)
    np.testing.assert_allclose(x[1], 1.0 / a, rtol=1e-14)


def test_structured_solve_flags_singular_and_ill_pivoted_elements():
    m = 1000
    entries, rhs = random_batch(m, seed=2)
    entries = {key: v.copy() for key, v in entries.items()}
    for key in entries:  # element 5: all zero, singular
        entries[key][5] = 0.0
    x, ok = solve_structured(entries, rhs, 7, m)
    assert not ok[5] and np.all(x[:, 5] == 0.0)
    good = np.flatnonzero(ok)
    assert good.size == m - 1
    np.testing.assert_allclose(x[:, good], lapack({k: v[good] for k, v in entries.items()},
                                                  {k: v[good] for k, v in rhs.items()}, 7, good.size),
                               rtol=1e-12, atol=1e-12)


def test_structured_solve_never_returns_an_inaccurate_answer_as_solved():
    # A 2x2 batch where one element (not in the pivot sample) has a tiny (0, 0) entry:
    # eliminating with it, as the sample suggests for the batch, loses all accuracy. The
    # residual check must flag that element (it then goes to LAPACK) and only that one.
    m = 1000
    a00 = np.ones(m)
    a00[1] = 1e-18
    entries = {(0, 0): a00, (0, 1): np.ones(m), (1, 0): np.ones(m), (1, 1): np.full(m, 2.0)}
    rhs = {0: np.ones(m), 1: np.full(m, 3.0)}
    x, ok = solve_structured(entries, rhs, 2, m)
    ref = lapack(entries, rhs, 2, m)
    assert not ok[1] and ok.sum() == m - 1
    np.testing.assert_allclose(x[:, ok], ref[:, ok], rtol=1e-12)


def test_bracketed_solve_answers_do_not_depend_on_batch_neighbours():
    # x^3 = a: half the batch starts on its root (f = 0) and leaves the working set at
    # once, so the rest is solved on a cut-down set; cube roots are the reference.
    a = np.concatenate([np.linspace(0.1, 8.0, 40), np.full(40, 1.0)])
    x0 = np.concatenate([np.full(40, 1.5), np.ones(40)])

    def fun(x, idx):
        return x**3 - a[idx], 3 * x**2

    x, ok = solve_bracketed(fun, np.zeros(80), np.full(80, 3.0), x0=x0, xtol=1e-13)
    assert ok.all()
    np.testing.assert_allclose(x, np.cbrt(a), rtol=1e-13)
    for i in (0, 17, 39, 60):
        xi, _ = solve_bracketed(lambda x, idx: (x**3 - a[i], 3 * x**2), np.zeros(1), np.full(1, 3.0),
                                x0=x0[i:i + 1], xtol=1e-13)
        assert xi[0] == x[i]


def test_newton_answers_do_not_depend_on_batch_neighbours():
    # x0^2 + x1 = p, x0 - x1 = 1 (closed form below); some elements start on their root.
    p = np.linspace(2.0, 30.0, 60)
    root0 = (-1 + np.sqrt(1 + 4 * (p + 1))) / 2
    start = np.stack([np.where(np.arange(60) < 40, root0, 3.0), np.where(np.arange(60) < 40, root0 - 1, 1.0)])

    def fun(x, idx):
        r = np.stack([x[0] ** 2 + x[1] - p[idx], x[0] - x[1] - 1.0])
        jac = np.empty((x.shape[1], 2, 2))
        jac[:, 0, 0], jac[:, 0, 1], jac[:, 1, 0], jac[:, 1, 1] = 2 * x[0], 1.0, 1.0, -1.0
        return r, jac

    x, ok = newton(fun, start, xtol=1e-12)
    assert ok.all()
    np.testing.assert_allclose(x[0], root0, rtol=1e-13)
    for i in (0, 45, 59):
        xi, _ = newton(lambda x, idx: fun(x, np.array([i])), start[:, i:i + 1], xtol=1e-12)
        assert np.array_equal(xi[:, 0], x[:, i])


def test_newton_keeps_solving_a_batch_with_a_singular_jacobian():
    # Three unknowns (the dense LAPACK path): A x = b with A regular except for element 2,
    # whose A is singular. LAPACK refuses a batch holding a singular matrix; the others
    # must still converge, and element 2 must be reported, not solved.
    m = 6
    rng = np.random.default_rng(3)
    a = rng.uniform(-1, 1, (m, 3, 3)) + 4 * np.eye(3)
    a[2] = [[1, 2, 3], [2, 4, 6], [0, 1, 1]]
    b = rng.normal(size=(3, m))

    def fun(x, idx):
        aa = a[idx]
        return np.einsum("nij,jn->in", aa, x) - b[:, idx], aa

    x, ok = newton(fun, np.zeros((3, m)))
    assert ok.tolist() == [True, True, False, True, True, True]
    for i in np.flatnonzero(ok):
        np.testing.assert_allclose(x[:, i], np.linalg.solve(a[i], b[:, i]), rtol=1e-12)


def test_structured_solve_flags_an_element_its_shared_pivot_order_spoils():
    # The pivot order is chosen on a sample of the batch (every other element of 512): an
    # element outside the sample whose chosen pivot is 1e-20 of its row loses every digit
    # to elimination without pivoting. Its residual, far above 1e-9 of its row's scale, must
    # be reported (ok False) so a dense solve with pivoting takes over; the others are
    # exact. Entries in microsiemens and currents in microamperes, as in the stages (a
    # check relative to the rows' scale, not an absolute one, is what catches it).
    m = 512
    a00 = np.full(m, 2e-6)
    a00[1] = 2e-26  # element 1 is not in the sample (step 2)
    entries = {(0, 0): a00, (0, 1): np.full(m, 1e-6), (1, 0): np.full(m, 1e-6), (1, 1): np.full(m, 1e-6)}
    rhs = {0: np.full(m, 3e-6), 1: np.full(m, 2e-6)}
    x, ok = solve_structured(entries, rhs, 2, m)
    assert not ok[1]
    good = np.arange(m) != 1
    assert ok[good].all()
    # By hand, a00 = 2: 2 x + y = 3, x + y = 2 -> x = 1, y = 1.
    assert np.allclose(x[:, good], 1.0, rtol=1e-12)
