"""Batches of small linear systems: dense LAPACK solves with per-element singular handling,
and Gaussian elimination over a shared sparse structure.
"""
from __future__ import annotations

import numpy as np


def _solve_each(jac, r):
    """-jac^-1 r for a batch of dense systems, jac (n, k, k) and r (k, n); NaN columns
    where a matrix is singular (LAPACK refuses the whole batch when one is)."""
    try:
        return -np.linalg.solve(jac, r.T[:, :, None])[:, :, 0].T
    except np.linalg.LinAlgError:
        sign, _ = np.linalg.slogdet(jac)
        dx = np.full(r.shape, np.nan)
        regular = sign != 0
        try:
            dx[:, regular] = -np.linalg.solve(jac[regular], r.T[regular][:, :, None])[:, :, 0].T
        except np.linalg.LinAlgError:
            pass
        return dx


def dense(entries, k, n):
    """The (n, k, k) batch of matrices whose non-zero entries are `entries`."""
    a = np.zeros((n, k, k))
    for (row, col), val in entries.items():
        a[:, row, col] = val
    return a


def solve_structured(entries, rhs, k, m, rtol=1e-9):
    """Solve a batch of small sparse systems that share one structure, A x = b.

    Gaussian elimination over the structural non-zeros only: each step takes the pivot
    with the fewest fill-ins (Markowitz), among entries that are not small against their
    row on a sample of the batch, so one numpy operation covers a row update of the whole
    batch. Elimination without per-element pivoting can lose accuracy on some element;
    the residual of every element is checked, and those that fail are reported for a
    dense solve with partial pivoting.

    Parameters
    ----------
    entries : dict (row, col) -> ndarray (m,)
        The structurally non-zero entries of A.
    rhs : dict row -> ndarray (m,)
        The non-zero rows of b.
    k, m : int
        System size and batch size.

    Returns
    -------
    x : ndarray (k, m)
    ok : ndarray of bool (m,)
        False where a pivot vanished or the residual exceeds rtol of the row's scale.
    """
    if m == 0:
        return np.zeros((k, 0)), np.zeros(0, dtype=bool)
    a = dict(entries)
    b = {row: np.asarray(v, dtype=float) for row, v in rhs.items()}
    sample = slice(None, None, max(1, m // 256))
    row_cols = {i: {j for (ii, j) in a if ii == i} for i in range(k)}  # remaining rows
    col_rows = {j: {i for (i, jj) in a if jj == j} for j in range(k)}  # remaining columns
    order = []
    with np.errstate(all="ignore"):
        for _ in range(k):
            best, best_key = None, None
            for i, cols in row_cols.items():
                mags = {c: np.abs(a[i, c][sample]) for c in cols}
                row_max = np.maximum(np.max(list(mags.values()), axis=0), 1e-300) if mags else None
                for c in cols:
                    strong = float(np.min(mags[c] / row_max))
                    key = (strong < 0.01, (len(cols) - 1) * (len(col_rows[c]) - 1), -strong)
                    if best_key is None or key < best_key:
                        best, best_key = (i, c), key
            if best is None:
                return np.zeros((k, m)), np.zeros(m, dtype=bool)  # structurally singular
            i, j = best
            order.append(best)
            cols = row_cols.pop(i)
            for c in cols:
                col_rows[c].discard(i)
            for r in col_rows.pop(j):
                f = a.pop((r, j)) / a[i, j]
                row_cols[r].discard(j)
                for c in cols - {j}:
                    upd = f * a[i, c]
                    if (r, c) in a:
                        a[r, c] = a[r, c] - upd
                    else:
                        a[r, c] = -upd
                        row_cols[r].add(c)
                        col_rows[c].add(r)
                if i in b:
                    b[r] = b[r] - f * b[i] if r in b else -f * b[i]
        x = np.zeros((k, m))
        for i, j in reversed(order):
            acc = b[i].copy() if i in b else np.zeros(m)
            for (ii, c), val in a.items():
                if ii == i and c != j:
                    acc -= val * x[c]
            x[j] = acc / a[i, j]
        res = np.zeros((k, m))
        scale = np.zeros((k, m))
        for (i, j), val in entries.items():
            t = val * x[j]
            res[i] += t
            scale[i] += np.abs(t)
        for i, v in rhs.items():
            res[i] -= v
            scale[i] += np.abs(v)
        ok = np.all(np.isfinite(x), axis=0) & np.all(np.abs(res) <= rtol * scale, axis=0)
    return np.where(ok, x, 0.0), ok
