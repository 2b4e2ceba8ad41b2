"""Vectorised scalar and multivariate root finding over a batch: a bracketed 1-D solver
and damped Newton, both with a working set that drops finished elements.

Every element stops on its own, so a result never depends on its batch neighbours.
"""
from __future__ import annotations

import numpy as np

from .linear import _solve_each


class _WorkingSet:
    """The batch elements an iteration hands to its function: all of them, as a slice
    (so that indexing copies nothing and device subsets are the devices themselves),
    until fewer than half are still iterating; from then on only those, as an index
    array. Finished elements inside the set are evaluated but never updated, so every
    element's iterates are the same whatever its batch neighbours do."""

    def __init__(self, live):
        self.idx = slice(None)
        self.live = live  # per element of idx: still iterating

    def refresh(self) -> int:
        """Drop finished elements once they are the majority; the live count."""
        n = int(np.count_nonzero(self.live))
        if 0 < n < 0.5 * self.live.size:
            self.idx = np.flatnonzero(self.live) if isinstance(self.idx, slice) else self.idx[self.live]
            self.live = np.ones(n, dtype=bool)
        return n

    def mark(self, flags, mask):
        """Set flags (one per batch element) where mask (one per set element) holds."""
        if isinstance(self.idx, slice):
            flags |= mask
        else:
            flags[self.idx[mask]] = True


def solve_bracketed(fun, lo, hi, x0=None, xtol=1e-10, max_iter=100, flo=None, fhi=None):
    """Vectorised safeguarded Newton inside a bracket (Newton steps that leave the bracket
    or shrink it too slowly are replaced by bisection).

    Parameters
    ----------
    fun : callable
        fun(x, idx) -> (f, df) for the elements `idx` (a slice or an integer index array
        into the batch) at points x.
    lo, hi : ndarray, shape (m,)
        Bracket ends; f(lo) and f(hi) must differ in sign (or one be zero).
    x0 : ndarray, shape (m,), optional
        Starting point inside the bracket (default: midpoint).
    flo, fhi : ndarray, shape (m,), optional
        f at the bracket ends, when the caller has them already.

    Returns
    -------
    x : ndarray, shape (m,)
        Root estimates.
    ok : ndarray of bool, shape (m,)
        True where the bracket held a sign change and the iteration met `xtol`.
    """
    lo = np.array(lo, dtype=float)
    hi = np.array(hi, dtype=float)
    m = lo.shape[0]
    with np.errstate(all="ignore"):
        flo = fun(lo, slice(None))[0] if flo is None else np.asarray(flo, dtype=float)
        fhi = fun(hi, slice(None))[0] if fhi is None else np.asarray(fhi, dtype=float)
    ok = (np.sign(flo) * np.sign(fhi)) <= 0
    # Orient so that f(lo) <= 0 <= f(hi).
    swap = flo > 0
    lo, hi = np.where(swap, hi, lo), np.where(swap, lo, hi)
    x = 0.5 * (lo + hi) if x0 is None else np.clip(np.array(x0, dtype=float), np.minimum(lo, hi), np.maximum(lo, hi))
    done = ~ok | (flo == 0) | (fhi == 0)
    x = np.where(flo == 0, np.where(swap, hi, lo), x)
    x = np.where(fhi == 0, np.where(swap, lo, hi), x)
    ws = _WorkingSet(~done)
    for _ in range(max_iter):
        if ws.refresh() == 0:
            break
        live, idx = ws.live, ws.idx
        xa, la, ha = x[idx], lo[idx], hi[idx]
        with np.errstate(all="ignore"):
            f, df = fun(xa, idx)
            neg = f < 0
            la = np.where(neg & live, xa, la)
            ha = np.where(neg | ~live, ha, xa)
            xn = xa - f / df
        bad = ~np.isfinite(xn) | ((xn - la) * (xn - ha) > 0)
        xn = np.where(bad, 0.5 * (la + ha), xn)
        xn = np.where((f == 0) | ~live, xa, xn)  # an exact root stays where it is (flat stretches included)
        conv = (np.abs(xn - xa) < xtol) | (f == 0) | (np.abs(ha - la) < xtol)
        x[idx], lo[idx], hi[idx] = xn, la, ha
        ws.live = live & ~conv
    unfinished = np.zeros(m, dtype=bool)
    ws.mark(unfinished, ws.live)
    return x, ok & ~unfinished


def newton(fun, x0, step_max=0.25, xtol=1e-8, max_iter=60):
    """Vectorised damped Newton for small square systems.

    Parameters
    ----------
    fun : callable
        fun(x, idx) -> (r, jac): residuals (k, n) and Jacobian (n, k, k) for the n
        elements `idx` (a slice or an integer index array into the batch) at points x of
        shape (k, n).
    x0 : ndarray, shape (k, m)
        Starting point.
    step_max : float
        Largest change of any unknown per step (volts), the damping.
    xtol : float
        An element has converged once a full (undamped) step smaller than this has been
        applied: Newton converges quadratically here, so the error left is about xtol^2
        times the curvature of the residuals (1 to 10 per volt in these stages); the
        default leaves far below 1e-12 V.

    Returns
    -------
    x : ndarray, shape (k, m)
    ok : ndarray of bool, shape (m,)
        Converged elements; the others are left at their last iterate.
    """
    x = np.array(x0, dtype=float)
    m = x.shape[1]
    ok = np.zeros(m, dtype=bool)
    ws = _WorkingSet(np.ones(m, dtype=bool))
    for _ in range(max_iter):
        if ws.refresh() == 0:
            break
        live, idx = ws.live, ws.idx
        xa = x[:, idx]
        with np.errstate(all="ignore"):
            r, jac = fun(xa, idx)
            if x.shape[0] == 2:  # Cramer's rule: far cheaper than a batched LAPACK call
                det = jac[:, 0, 0] * jac[:, 1, 1] - jac[:, 0, 1] * jac[:, 1, 0]
                dx = -np.stack([(jac[:, 1, 1] * r[0] - jac[:, 0, 1] * r[1]) / det,
                                (jac[:, 0, 0] * r[1] - jac[:, 1, 0] * r[0]) / det])
            else:
                dx = _solve_each(jac, r)
        finite = np.all(np.isfinite(dx), axis=0)
        dx = np.where(finite & live, dx, 0.0)
        big = np.max(np.abs(dx), axis=0)
        scale = np.where(big > step_max, step_max / np.maximum(big, 1e-300), 1.0)
        x[:, idx] = xa + dx * scale
        conv = live & finite & (big < xtol)
        ws.mark(ok, conv)
        ws.live = live & finite & ~conv
    return x, ok
