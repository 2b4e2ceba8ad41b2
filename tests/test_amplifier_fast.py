"""The fast paths of the amplifier response against the straightforward computation they
replace: batched LAPACK eigenvalues of -G^-1 C for every pencil (poles, zeros, internal
network), a separate solve for H(0), and the crossing search on the complex loop gain
with its phase. The reference is kept here, used only by these tests.

Check values: the reference computation itself (common practice, no source). Tolerance
1e-9 relative on every amplifier metric: the closed forms accept at most six lost digits
to cancellation (`response.CANCEL`), about 2e-10, and hand the rest to LAPACK.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from models.amplifier import inside, response
from models.devices.constants import ZERO_CELSIUS
from models.devices.tech import Corner
from models.evaluate import Conditions, Design, evaluate
from models.numerics.roots import solve_bracketed
from optimise.files.study import load_design, load_study

ROOT = Path(__file__).resolve().parents[1]
REL = 1e-9  # see the module docstring


def _reference_poles_zeros(g, c, drive, out):
    """The poles, zeros, H(0), internal poles and flags, all by batched LAPACK."""
    k = g.shape[1]
    mu_p, ok = response._roots_lapack(g, c)
    inner = [r for r in range(k) if r not in (drive, out)]
    mu_i = response._roots_lapack(g[:, inner][:, :, inner], c[:, inner][:, :, inner])[0]
    rows = [r for r in range(k) if r != drive]
    cols = [q for q in range(k) if q != out]
    mu_z, _ = response._roots_lapack(g[:, rows][:, :, cols], c[:, rows][:, :, cols])
    e = np.zeros((g.shape[0], k, 1))
    e[:, drive] = 1.0
    h0 = np.where(ok, response._solve(g, e)[0][:, out, 0], 0.0)
    return mu_p, mu_z, h0, mu_i, ok


def _reference_unity_gain(t0, mu_p, mu_z):
    """The crossing search on the full complex loop gain (`response.loop_gain`)."""
    lo_f, hi_f = np.log10(response.F_LOW), np.log10(response.F_HIGH)
    dom = np.max(np.abs(mu_p), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = np.clip(np.log10(t0 / (response.TWO_PI * np.maximum(dom, 1e-300))), lo_f + 1e-6, hi_f - 1e-6)
    has = t0 > 1.0
    x = np.zeros(len(t0))
    ix = np.flatnonzero(has)
    tp, pp, zz = t0[ix], mu_p[ix], mu_z[ix]

    def fun(lf, idx):
        lt, _, sl = response.loop_gain(tp[idx], pp[idx], zz[idx], 10.0 ** lf)
        return lt, sl

    lo, hi = np.full(ix.size, lo_f), np.full(ix.size, hi_f)
    flo, fhi = fun(lo, slice(None))[0], fun(hi, slice(None))[0]
    ok = (flo > 0) & (fhi < 0)
    xs, _ = solve_bracketed(fun, lo, hi, x0=est[ix], xtol=1e-9, flo=np.where(ok, flo, 1.0), fhi=np.where(ok, fhi, -1.0))
    x[ix] = np.where(ok, xs, np.where(fhi >= 0, hi_f, lo_f))
    f_u = np.where(has, 10.0 ** x, 0.0)
    _, phase, _ = response.loop_gain(t0, mu_p, mu_z, np.where(has, f_u, 1.0))
    return f_u, np.where(has, 180.0 + phase, 180.0)


def _metrics(poles_zeros, unity_gain, g, c, drive, out, gm1):
    mu_p, mu_z, h0, mu_i, ok = poles_zeros(g, c, drive, out)
    ugf, pm = unity_gain(gm1 * np.abs(h0), mu_p, mu_z)
    p1, fp2, fint = response.classify(mu_p, mu_i)
    return {"ugf": ugf, "pm": pm, "p1": p1, "fp2": fp2, "fint": fint, "fz": response.rhp_zero(mu_z)}, ok


def _relative(a, b):
    with np.errstate(all="ignore"):
        return np.where(a == b, 0.0, np.abs(a - b) / np.maximum(np.abs(a), np.abs(b)))


@pytest.mark.parametrize("arch", ["floating-loop", "fixed-bias", "follower"])
def test_fast_response_matches_the_lapack_reference_on_random_designs(arch, monkeypatch):
    study = load_study(ROOT / "studies" / "sensor-buffer.toml")
    base = load_design(ROOT / "studies" / f"sensor-buffer-{arch}.toml", study.tech)
    rng = np.random.default_rng(3)
    n = 20

    def spread(v):  # log-uniform over a factor of two either way around the demo design
        return np.repeat(v, n) * np.exp(rng.uniform(-0.7, 0.7, n))

    pop = Design(arch, {k: spread(v) for k, v in base.w.items()}, {k: np.maximum(spread(v), 0.35e-6)
                 for k, v in base.l.items()}, {k: spread(v) for k, v in base.bias.items()}, base.tied)
    seen = []
    real_model = inside.model

    def recording(*args, **kwargs):
        out = real_model(*args, **kwargs)
        seen.append(out[:4])
        return out

    monkeypatch.setattr(inside, "model", recording)
    cond = Conditions(tuple(Corner), (27 + ZERO_CELSIUS,), 3.3, 2.7, 3.6)
    res = evaluate(pop, study.tech, cond, study.targets)
    assert res.converged.mean() > 0.9
    g = np.concatenate([s[0] for s in seen])
    c = np.concatenate([s[1] for s in seen])
    drive, out = seen[0][2], seen[0][3]
    gm1 = study.targets.amplifier.transconductance
    fast, ok = _metrics(response.poles_zeros, response.unity_gain, g, c, drive, out, gm1)
    ref, ok_ref = _metrics(_reference_poles_zeros, _reference_unity_gain, g, c, drive, out, gm1)
    assert np.array_equal(ok, ok_ref)
    for name in fast:
        assert np.max(_relative(fast[name][ok], ref[name][ok])) <= REL, name
    # The search's own figures are these: evaluate reported the same crossing.
    assert np.allclose(res.pvt["ugf_hz"].ravel()[ok], fast["ugf"][ok], rtol=1e-15, atol=0.0)


def test_two_node_closed_form_matches_lapack_or_hands_the_element_over():
    rng = np.random.default_rng(5)
    m = 4000
    # Graded pencils: conductances and capacitances spread over eight decades, random
    # signs off the diagonal (transconductances), a share of nearly singular ones.
    g = rng.standard_normal((m, 2, 2)) * 10.0 ** rng.uniform(-8, 0, (m, 2, 2))
    c = np.abs(rng.standard_normal((m, 2, 2))) * 10.0 ** rng.uniform(-14, -10, (m, 2, 2))
    near = rng.random(m) < 0.2
    g[near, 1, 1] = g[near, 0, 1] * g[near, 1, 0] / g[near, 0, 0] * (1.0 + 1e-12 * rng.standard_normal(near.sum()))
    mu, trust = response._roots_pair(g, c)
    ref, reg = response._roots_lapack(g, c)
    assert 0 < trust.sum() < m  # both kinds are exercised
    both = trust & reg
    # Matched by size (the larger with the larger) and compared relative to each root.
    a = np.sort_complex(np.where(np.abs(mu[both, :1]) >= np.abs(mu[both, 1:]), mu[both], mu[both][:, ::-1]))
    b = np.sort_complex(np.where(np.abs(ref[both, :1]) >= np.abs(ref[both, 1:]), ref[both], ref[both][:, ::-1]))
    for j in range(2):
        assert np.max(np.abs(np.abs(a[:, j]) - np.abs(b[:, j])) / np.abs(b[:, j])) <= REL
    # What the closed form does not trust is LAPACK's answer, bit for bit.
    full, regular = response._roots(g, c)
    assert np.array_equal(full[~trust], ref[~trust].astype(complex))
    assert np.array_equal(regular[~trust], reg[~trust])


def test_single_node_closed_form_is_lapacks_answer_bit_for_bit():
    rng = np.random.default_rng(6)
    g = rng.standard_normal((500, 1, 1)) * 10.0 ** rng.uniform(-9, 0, (500, 1, 1))
    c = rng.random((500, 1, 1)) * 1e-12
    g[:5] = 0.0  # singular: no finite root, not regular
    mu, regular = response._roots(g, c)
    ref, reg = response._roots_lapack(g, c)
    assert np.array_equal(regular, reg)
    assert np.array_equal(mu[regular], ref[regular])
    assert np.all(mu[~regular] == 0)
