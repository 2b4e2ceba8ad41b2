"""Poles, zeros and loop gain of the small-signal model (G, C) of `smallsignal`.

Poles are the roots of det(G + s C) and the zeros of the transfer from a current into the
driven node to the output voltage the roots of the cofactor det(G' + s C') (G and C with
the driven node's row and the output's column removed, Cramer's rule). Both come as the
eigenvalues mu of -G^-1 C (and -G'^-1 C'), mu = 1/s: an infinite root (a node without
capacitance) is mu = 0 and drops out of every product below, so a singular C needs no
special case. Then

    H(s) = H(0) prod_z (1 - s mu_z) / prod_p (1 - s mu_p),   H(0) = [G^-1]_(out, drive),

and with the first stage's gm1 and the feedback factor beta the loop gain is
T(s) = beta gm1 |H(0)| prod_z (1 - s mu_z) / prod_p (1 - s mu_p), the first stage wired so
that the feedback is negative (T(0) > 0). The phase is the sum of each factor's angle,
each continuous in frequency (the imaginary part of 1 - j w mu keeps its sign), so it
needs no unwrapping.

All arrays are over the flat batch (m,); poles and zeros in rad/s (complex).
"""
from __future__ import annotations

import numpy as np

from ..numerics.roots import solve_bracketed

TWO_PI = 2.0 * np.pi
F_LOW, F_HIGH = 1e-3, 1e12  # Hz, the bracket of the unity-gain search


def _solve(g, c):
    """G^-1 C for a batch, and the flags of the regular elements; a singular or non-finite
    G gives zeros there (LAPACK refuses the whole batch when one element is singular)."""
    finite = np.all(np.isfinite(g), axis=(1, 2)) & np.all(np.isfinite(c), axis=(1, 2))
    if finite.all():
        try:
            return np.linalg.solve(g, c), finite
        except np.linalg.LinAlgError:
            pass
    sign, _ = np.linalg.slogdet(np.where(finite[:, None, None], g, 1.0))
    regular = finite & (sign != 0)
    out = np.zeros(np.broadcast_shapes(g.shape, c.shape))
    if regular.any():
        out[regular] = np.linalg.solve(g[regular], c[regular])
    return out, regular


def _roots(g, c):
    """mu = eigenvalues of -G^-1 C (m, k), complex, and the regular flags (m,); a singular
    element gives mu = 0 (no finite root)."""
    a, regular = _solve(g, c)
    return np.linalg.eigvals(-a), regular


def poles_zeros(g, c, drive: int, out: int):
    """Eigenvalues mu of the poles (m, k) and zeros (m, k-1), H(0) (m,), the poles of the
    internal network (m, k-2): the nodes other than the driven node and the output, with
    those two held (the undriven gate of the floating loop, reached through the control
    pair, and the bias nodes), and the flags (m,) of the elements whose G is regular (the
    others' figures are not to be used)."""
    k = g.shape[1]
    mu_p, ok = _roots(g, c)
    inner = [r for r in range(k) if r not in (drive, out)]
    mu_i = _roots(g[:, inner][:, :, inner], c[:, inner][:, :, inner])[0] if inner else np.zeros((g.shape[0], 0))
    rows = [r for r in range(k) if r != drive]
    cols = [q for q in range(k) if q != out]
    gr = g[:, rows][:, :, cols]
    cr = c[:, rows][:, :, cols]
    # A singular cofactor is a zero at s = 0, H(0) = 0 (a stage cut off): no loop gain, so
    # its other zeros do not matter; they are dropped (mu = 0).
    mu_z, _ = _roots(gr, cr)
    e = np.zeros((g.shape[0], k, 1))
    e[:, drive] = 1.0
    h0 = np.where(ok, _solve(g, e)[0][:, out, 0], 0.0)
    return mu_p, mu_z, h0, mu_i, ok


def to_rad(mu):
    """Roots s = 1/mu [rad/s]; mu = 0 (an infinite root) gives inf."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(mu != 0, 1.0 / np.where(mu != 0, mu, 1.0), np.inf)


def loop_gain(t0, mu_p, mu_z, f):
    """T(j 2 pi f), its magnitude and unwrapped phase [deg]; f (m,) or (m, nf) [Hz].

    Returns (log10 |T|, phase_deg, d log10|T| / d log10 f), each the shape of f."""
    f = np.asarray(f, dtype=float)
    extra = f.ndim - 1
    w = TWO_PI * f
    shape = (slice(None),) + (None,) * extra

    def parts(mu):
        mu = mu[(slice(None),) + (None,) * extra + (slice(None),)]  # (m, [nf,] k)
        x = 1.0 - 1j * w[..., None] * mu
        mag = np.log10(np.abs(x)).sum(axis=-1)
        ang = np.arctan2(x.imag, x.real).sum(axis=-1)
        slope = np.real(-1j * w[..., None] * mu / x).sum(axis=-1)
        return mag, ang, slope

    mz, az, sz = parts(mu_z)
    mp, ap, sp = parts(mu_p)
    with np.errstate(divide="ignore"):  # T(0) = 0 (a stage cut off): log10 |T| = -inf, no crossing
        logt = np.log10(np.asarray(t0)[shape]) + mz - mp
    return logt, np.degrees(az - ap), sz - sp


def unity_gain(t0, mu_p, mu_z):
    """Unity-gain frequency [Hz] and phase margin [deg] of each element.

    The crossing |T| = 1 is found by safeguarded Newton on log10 |T| over log10 f between
    1 mHz and 1 THz, started at the single-pole estimate t0 / (2 pi |mu_dominant|). Where
    |T(0)| <= 1 there is no crossing: ugf 0 and phase margin 180 degrees.
    """
    m = len(t0)
    dom = np.max(np.abs(mu_p), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = np.clip(np.log10(t0 / (TWO_PI * np.maximum(dom, 1e-300))), np.log10(F_LOW) + 1e-6,
                      np.log10(F_HIGH) - 1e-6)
    has = t0 > 1.0
    x = np.zeros(m)
    if has.any():
        ix = np.flatnonzero(has)
        tp, pp, zz = t0[ix], mu_p[ix], mu_z[ix]

        def fun(lf, idx):
            lt, _, sl = loop_gain(tp[idx], pp[idx], zz[idx], 10.0 ** lf)
            return lt, sl

        lo = np.full(ix.size, np.log10(F_LOW))
        hi = np.full(ix.size, np.log10(F_HIGH))
        flo = fun(lo, slice(None))[0]
        fhi = fun(hi, slice(None))[0]
        ok = (flo > 0) & (fhi < 0)
        xs, _ = solve_bracketed(fun, lo, hi, x0=est[ix], xtol=1e-9, flo=np.where(ok, flo, 1.0),
                                fhi=np.where(ok, fhi, -1.0))
        x[ix] = np.where(ok, xs, np.where(fhi >= 0, np.log10(F_HIGH), np.log10(F_LOW)))
    f_u = np.where(has, 10.0 ** x, 0.0)
    _, phase, _ = loop_gain(t0, mu_p, mu_z, np.where(has, f_u, 1.0))
    pm = np.where(has, 180.0 + phase, 180.0)
    return f_u, pm


def classify(mu_p, mu_i):
    """Dominant pole, non-dominant (output) pole and lowest internal pole [Hz] (magnitudes).

    Dominant: the lowest pole of the full model; output pole: the next one (pole
    splitting moves it up, the gate capacitance down); internal: the lowest pole of the
    internal network with the driven node and the output held (in the floating loop the
    gate that is not driven, reached through the control pair: about gm_ctl / C_gate);
    inf when the model has none.
    """
    mag = np.sort(np.abs(to_rad(mu_p)) / TWO_PI, axis=1)
    inner = np.abs(to_rad(mu_i)) / TWO_PI
    fint = np.min(inner, axis=1) if inner.shape[1] else np.full(mag.shape[0], np.inf)
    return mag[:, 0], mag[:, 1] if mag.shape[1] > 1 else np.full(mag.shape[0], np.inf), fint


def rhp_zero(mu_z):
    """Lowest right-half-plane zero [Hz] (magnitude); inf when there is none."""
    s = to_rad(mu_z)
    mag = np.where(np.isfinite(s) & (np.real(s) > 0), np.abs(s), np.inf) / TWO_PI
    return np.min(mag, axis=1)


def closed_loop_poles(g, c, gm_fb, drive: int, out: int):
    """Poles [rad/s] (m, k) of the loop closed by a transconductance gm_fb (m,) [S] from
    the output voltage into the driven node (current gm_fb v_out leaves the driven node:
    negative feedback when gm_fb H(0) > 0). A pole with positive real part: unstable."""
    gc = g.copy()
    gc[:, drive, out] += gm_fb
    return to_rad(_roots(gc, c)[0])
