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


def _roots_lapack(g, c):
    """mu = eigenvalues of -G^-1 C (m, k), complex, and the regular flags (m,); a singular
    element gives mu = 0 (no finite root). Batched LAPACK, any k."""
    a, regular = _solve(g, c)
    return np.linalg.eigvals(-a), regular


def _roots_single(g, c):
    """`_roots_lapack` for k = 1 without LAPACK's cost per matrix: mu = -c / g (the same
    division LAPACK's solve makes, so the same bits); a zero or non-finite g gives mu = 0,
    not regular."""
    finite = np.isfinite(g[:, 0, 0]) & np.isfinite(c[:, 0, 0])
    regular = finite & (g[:, 0, 0] != 0)
    with np.errstate(all="ignore"):
        mu = np.where(regular, -(c[:, 0, 0] / np.where(regular, g[:, 0, 0], 1.0)), 0.0)
    return mu[:, None], regular


# Cancellation the closed form for two nodes accepts: a difference of products at least
# this fraction of the products' sizes loses at most six of the sixteen digits, so the
# roots stay within about 1e-10 of LAPACK's; worse elements go to LAPACK. So do real
# roots further apart than this ratio: LAPACK's smaller root carries an error of about
# 1e-16 of the larger one, and the answers stay LAPACK's where its own error would show.
CANCEL = 1e-6
SPREAD = 1e-6


def _roots_pair(g, c):
    """`_roots_lapack` for k = 2 in closed form, without LAPACK's cost per matrix, and the
    flags of the elements it could not trust (left to LAPACK, mu = 0 there).

    B = -G^-1 C by Cramer's rule, mu = h +- sqrt(d), h half the trace of B and
    d = (b00 - b11)^2 / 4 + b01 b10: the larger real root from the sum that does not
    cancel, the other from det B over it, so both keep their relative accuracy when they
    lie decades apart. An element is left to LAPACK where det G, d or det B cancel (below
    `CANCEL` of their terms), where a complex pair's real part h cancels, where the real
    roots lie more than `SPREAD` apart, or where G is singular or anything is not finite."""
    with np.errstate(all="ignore"):
        g00, g01, g10, g11 = g[:, 0, 0], g[:, 0, 1], g[:, 1, 0], g[:, 1, 1]
        det = g00 * g11 - g01 * g10
        inv = 1.0 / det
        c00, c01, c10, c11 = c[:, 0, 0], c[:, 0, 1], c[:, 1, 0], c[:, 1, 1]
        b00 = -(g11 * c00 - g01 * c10) * inv
        b01 = -(g11 * c01 - g01 * c11) * inv
        b10 = -(g00 * c10 - g10 * c00) * inv
        b11 = -(g00 * c11 - g10 * c01) * inv
        half = 0.5 * (b00 + b11)
        quarter = 0.25 * (b00 - b11) ** 2
        disc = quarter + b01 * b10
        detb = b00 * b11 - b01 * b10
        real = disc >= 0
        root = np.sqrt(np.abs(disc))
        big = half + np.where(half >= 0, root, -root)
        other = detb / big
        trust = (np.abs(det) >= CANCEL * (np.abs(g00 * g11) + np.abs(g01 * g10)))
        trust &= np.abs(disc) >= CANCEL * (quarter + np.abs(b01 * b10))
        trust &= np.abs(detb) >= CANCEL * (np.abs(b00 * b11) + np.abs(b01 * b10))
        trust &= real | (np.abs(half) >= CANCEL * (np.abs(b00) + np.abs(b11)))
        trust &= ~real | (np.abs(other) >= SPREAD * np.abs(big))
        trust &= np.isfinite(big) & np.isfinite(other) & np.isfinite(root) & (big != 0)
        mu = np.empty((g.shape[0], 2), dtype=complex)
        mu[:, 0] = np.where(real, big, half + 1j * root)
        mu[:, 1] = np.where(real, other, half - 1j * root)
    mu[~trust] = 0.0
    return mu, trust


def _roots(g, c):
    """mu = eigenvalues of -G^-1 C (m, k), complex, and the regular flags (m,); a singular
    element gives mu = 0 (no finite root). One and two nodes in closed form (two: LAPACK
    for the elements the closed form cannot trust), more by LAPACK."""
    k = g.shape[1]
    if k == 1:
        return _roots_single(g, c)
    if k == 2:
        mu, trust = _roots_pair(g, c)
        if not trust.all():
            rest = ~trust
            mu_r, reg_r = _roots_lapack(g[rest], c[rest])
            mu[rest] = mu_r
            regular = trust.copy()
            regular[rest] = reg_r
            return mu, regular
        return mu, trust
    return _roots_lapack(g, c)


def poles_zeros(g, c, drive: int, out: int):
    """Eigenvalues mu of the poles (m, k) and zeros (m, k-1), H(0) (m,), the poles of the
    internal network (m, k-2): the nodes other than the driven node and the output, with
    those two held (the undriven gate of the floating loop, reached through the control
    pair, and the bias nodes), and the flags (m,) of the elements whose G is regular (the
    others' figures are not to be used)."""
    k = g.shape[1]
    # One LU of G for the poles and H(0): G^-1 [C | e_drive].
    e = np.zeros((g.shape[0], k, 1))
    e[:, drive] = 1.0
    a, ok = _solve(g, np.concatenate([c, e], axis=2))
    mu_p = np.linalg.eigvals(-a[:, :, :k])
    h0 = np.where(ok, a[:, out, k], 0.0)
    inner = [r for r in range(k) if r not in (drive, out)]
    mu_i = _roots(g[:, inner][:, :, inner], c[:, inner][:, :, inner])[0] if inner else np.zeros((g.shape[0], 0))
    rows = [r for r in range(k) if r != drive]
    cols = [q for q in range(k) if q != out]
    gr = g[:, rows][:, :, cols]
    cr = c[:, rows][:, :, cols]
    # A singular cofactor is a zero at s = 0, H(0) = 0 (a stage cut off): no loop gain, so
    # its other zeros do not matter; they are dropped (mu = 0).
    mu_z, _ = _roots(gr, cr)
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


def _magnitude(t0, parts_p, parts_z, lf):
    """log10 |T| and its slope d log10|T| / d log10 f at log10 f = lf (m,): the parts of
    `loop_gain` the crossing search needs, without the phase, in real arithmetic.

    parts_p, parts_z: (real, imaginary) parts of the poles' and zeros' mu, each (m, k).
    Each factor x = 1 - j w mu = a - j b with a = 1 + w Im mu, b = w Re mu contributes
    log10 |x| = log10(a^2 + b^2) / 2 and the slope Re(-j w mu / x) = 1 - a / |x|^2."""
    w = (TWO_PI * 10.0 ** lf)[:, None]

    def parts(re, im):
        a = 1.0 + w * im
        with np.errstate(over="ignore"):
            q = a * a + (w * re) ** 2
        lg = 0.5 * np.log10(q)
        if not np.isfinite(q).all():  # |x| beyond 1e154 (a near-zero root): the overflow-free form there
            lg = np.where(np.isfinite(q), lg, np.log10(np.hypot(a, w * re)))
        return lg.sum(axis=-1), (1.0 - a / q).sum(axis=-1)

    mz, sz = parts(*parts_z)
    mp, sp = parts(*parts_p)
    with np.errstate(divide="ignore"):
        return np.log10(t0) + mz - mp, sz - sp


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
        tp = t0[ix]
        pp = (np.real(mu_p[ix]), np.imag(mu_p[ix]))
        zz = (np.real(mu_z[ix]), np.imag(mu_z[ix]))

        def fun(lf, idx):
            return _magnitude(tp[idx], tuple(v[idx] for v in pp), tuple(v[idx] for v in zz), lf)

        lo = np.full(ix.size, np.log10(F_LOW))
        hi = np.full(ix.size, np.log10(F_HIGH))
        flo = fun(lo, slice(None))[0]
        fhi = fun(hi, slice(None))[0]
        ok = (flo > 0) & (fhi < 0)
        xs, _ = solve_bracketed(fun, lo, hi, x0=est[ix], xtol=1e-9, flo=np.where(ok, flo, 1.0),
                                fhi=np.where(ok, fhi, -1.0))
        x[ix] = np.where(ok, xs, np.where(fhi >= 0, np.log10(F_HIGH), np.log10(F_LOW)))
    f_u = np.where(has, 10.0 ** x, 0.0)
    w = TWO_PI * np.where(has, f_u, 1.0)

    def angle(mu):  # the phase part of `loop_gain` alone
        x = 1.0 - 1j * w[:, None] * mu
        return np.arctan2(x.imag, x.real).sum(axis=-1)

    phase = np.degrees(angle(mu_z) - angle(mu_p))
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
