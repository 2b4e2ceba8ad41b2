"""Every metric of an output stage at every PVT point, for a whole population at once.

The population (n designs) and the PVT grid (k points: corner x temperature x supply) are
flattened to n*k elements and processed in chunks, so memory stays bounded whatever n is.
Per element: the rest point (exact), Iq and its mismatch sigma (adjoint sensitivities of
the full Kirchhoff system, Pelgrom sigmas), the output pole, the lowest supply that keeps
every device in its region, and both driven points (drive limit, headroom at the peak
load current, peak current, and the idle device's smallest current over the output range).

Numerical failure is reported per element (`converged` False, with a reason); the metric
values of such elements are not to be used.
"""
from __future__ import annotations

import numpy as np

from .circuit.mirrors import checked, mirror_area, mirror_deviations, source_keys, source_states
from .amplifier.inside import analyse as _amplifier
from .amplifier.smallsignal import common_source, output_junctions
from .devices import mismatch as _mm
from .devices.mos import gate_capacitance, inversion_coefficient
from .devices.table import gate_capacitance_from, outside_table
from .devices.tech import Corner, Tech
from .operating import (
    corner_shifts,
    devices_at,
    ab_ratio,
    driven_point,
    pull_down_current,
    rest_point,
    source_voltages,
)
from .records import LIMIT_NAMES, PVT_METRICS, Conditions, Design, Result, Targets
from .sources import compliance
from .stages import get_stage
from .summary import check, summarise, supply_power, supply_sensitivity

__all__ = ["LIMIT_NAMES", "PVT_METRICS", "Conditions", "Design", "Result", "Targets", "corner_shifts",
           "devices_at", "evaluate", "loop_gain_at", "monte_carlo_iq", "pull_down_current", "rest_point"]


def _chunk(stage, design, tech, cond_arrays, targets, idx_design, idx_pvt):
    shifts_all, temp_all, vdd_all = cond_arrays
    shifts = {p: tuple(a[idx_pvt] for a in v) for p, v in shifts_all.items()}
    temp = temp_all[idx_pvt]
    vdd = vdd_all[idx_pvt]
    devs = devices_at(stage, design, tech, shifts, temp, idx_design)
    bias = {k: np.asarray(v, dtype=float)[idx_design] for k, v in design.bias.items()}
    sources = source_states(stage.TOPOLOGY, targets.mirrors.get(design.architecture, {}), tech, devs, bias, vdd)
    nodes, ok, sens, op = rest_point(stage, devs, bias, vdd, sources=sources)
    iq = pull_down_current(stage, op)

    var = np.zeros_like(vdd)
    for spec in stage.TOPOLOGY.devices:
        dev, mt = devs[spec.role], tech.mos(spec.polarity)
        s_vt, s_beta = sens[spec.role]
        var += (s_vt * _mm.sigma_device_vt(mt.a_vt, dev.w, dev.l)) ** 2
        var += (s_beta * _mm.sigma_device_beta(mt.a_beta, dev.w, dev.l)) ** 2
    extra = {}
    if sources is not None:
        # The mirrors' deviations are independent of the devices' and of each other.
        across = source_voltages(stage, nodes, vdd)
        for name, rel in sources.rel_sigma.items():
            var += (sens[name][0] * rel) ** 2
            extra[f"mirror_v_{name}"] = across[name]
            extra[f"mirror_vmin_{name}"] = sources.v_min[name]
        # The driven points and the supply requirements see the mirror currents of rest.
        bias = sources.rest_bias(bias, nodes, vdd)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma_pct = np.where(iq > 0, 100.0 * np.sqrt(var) / iq, 0.0)

    gm = stage.gm_output(op)

    reqs = stage.requirements(devs, bias, vdd, nodes, op, targets.vcomp)
    req = np.stack([rq for _, rq in reqs])
    vdd_min = np.max(req, axis=0)
    vdd_min_what = np.argmax(req, axis=0)

    hh, i_src, g_src, lim_src, ok_src, can_src, v_src = driven_point(stage, devs, bias, vdd, nodes, +1, targets)
    hl, i_snk, g_snk, lim_snk, ok_snk, can_snk, v_snk = driven_point(stage, devs, bias, vdd, nodes, -1, targets)
    ab = ab_ratio(stage, devs, vdd, g_src, g_snk, v_src, v_snk, iq)

    c_drive = np.zeros_like(vdd)
    for role in (stage.PULL_DOWN, stage.PULL_UP):
        dev = devs[role]
        mt = tech.mos(stage.TOPOLOGY.spec(role).polarity)
        if dev.tab is not None:  # the card's intrinsic cgg from the tables, and both overlaps
            c_drive += gate_capacitance_from(dev.tab, dev.mos, dev.w, dev.l, iq) + 2.0 * mt.cov * dev.w
        else:
            c_drive += gate_capacitance(mt, dev.w, dev.l, inversion_coefficient(dev.mos, dev.w, dev.l, iq))
    if tech.tables is not None:
        # A rest point whose device voltages leave the tables would be an extrapolation, so
        # it counts as not solved.
        volts = {"out": 0.5 * vdd, **nodes, "vdd": vdd, "0": np.zeros_like(vdd)}
        for spec in stage.TOPOLOGY.devices:
            dev = devs[spec.role]
            vb = volts[spec.s] if dev.tied else volts[spec.rail]
            ok = ok & ~outside_table(dev.tab.table, *(spec.polarity * (volts[x] - vb) for x in (spec.g, spec.d, spec.s)),
                                    dev.tab.dvt)

    amp = targets.amplifier
    if amp is None:
        # No amplifier described: the output pole of a common-source pair with the
        # pole-splitting limit Cc >> C1, C2, gm2 / (C1 + C2) (Gray, Hurst, Lewis, Meyer,
        # 5th ed., sec. 9.4), C1 the output gates, C2 the load and the output devices'
        # junctions; the followers' output pole stays gm / C2 (their gate capacitance is
        # bootstrapped by the output).
        c_out = targets.c_load + output_junctions(stage, devs, tech, nodes, vdd) + \
            (c_drive if common_source(stage) else 0.0)
        fp2 = gm / (2.0 * np.pi * c_out)
    else:
        topo = stage.TOPOLOGY
        gate_n, gate_p = topo.spec(stage.PULL_DOWN).g, topo.spec(stage.PULL_UP).g
        limits = [{gate_n: g[0], gate_p: g[1]} for g in (g_src, g_snk)]
        # Mirror sources load their nodes with their output conductance at rest.
        g_source = None if sources is None else {name: op[name][1] for name in source_keys(topo) if name in op}
        amp_out, ok_amp = _amplifier(stage, devs, bias, tech, op, nodes, vdd, targets.c_load, amp, targets.drive,
                                     (i_src, i_snk), limits, g_source=g_source,
                                     cc=amp.compensation(design.cc, idx_design))
        ok = ok & ok_amp
        fp2 = amp_out.pop("fp2_hz")
        extra.update(amp_out)
    res = {
        "iq_a": iq, "headroom_high_v": hh, "headroom_low_v": hl, "swing_v": vdd - hh - hl,
        "iout_source_a": i_src, "iout_sink_a": i_snk, "ab_ratio": ab,
        "iq_sigma_pct": sigma_pct, "vdd_min_v": vdd_min, "fp2_hz": fp2, "c_drive_f": c_drive,
        "limit_source": lim_src, "limit_sink": lim_snk, "vdd_min_what": vdd_min_what,
        "delivers_source": can_src, "delivers_sink": can_snk, **extra,
    }
    return res, ok & ok_src & ok_snk, tuple(name for name, _ in reqs)


def evaluate(design: Design, tech: Tech, cond: Conditions, targets: Targets, chunk: int = 16384,
             explain: bool = True) -> Result:
    """All metrics of a population at every PVT point, with summary and violations.

    Parameters
    ----------
    design : Design
        n designs of one architecture.
    tech : Tech
    cond : Conditions
        k = corners x temperatures x supplies PVT points.
    targets : Targets
    chunk : int
        Elements (design x PVT pairs) processed at a time; bounds the memory.
    explain : bool
        Keep what is needed to word each design's violations when they are read (the
        search, which needs only the margins, turns this off).

    Returns
    -------
    Result
    """
    stage = get_stage(design.architecture)
    n = design.size
    corner, temp, vdd = cond.grid()
    k = len(vdd)
    m = n * k
    shifts = corner_shifts(tech, corner)
    flat_design = np.repeat(np.arange(n), k)
    flat_pvt = np.tile(np.arange(k), n)
    pvt: dict[str, np.ndarray] = {}
    converged = np.zeros(m, dtype=bool)
    req_names = ()
    for start in range(0, m, chunk):
        sl = slice(start, min(start + chunk, m))
        res, ok, req_names = _chunk(stage, design, tech, (shifts, temp, vdd), targets, flat_design[sl], flat_pvt[sl])
        for name, arr in res.items():
            if name not in pvt:
                pvt[name] = np.zeros(m, dtype=arr.dtype)
            pvt[name][sl] = arr
        converged[sl] = ok
    pvt = {name: arr.reshape(n, k) for name, arr in pvt.items()}
    converged = converged.reshape(n, k)
    supply_sensitivity(pvt, cond, corner, temp, vdd)
    supply_power(pvt, design, stage, vdd)
    summary = summarise(pvt, design, stage, cond, corner, temp, vdd, targets)
    mirrors = targets.mirrors.get(design.architecture, {})
    if mirrors:
        extra_area = mirror_area(stage.TOPOLOGY, mirrors)
        if extra_area > 0:
            summary["area_um2"] = summary["area_um2"] + extra_area * targets.layout_factor * 1e12
    violations, margins = check(pvt, summary, converged, cond, corner, temp, vdd, targets, req_names, explain)
    if mirrors:
        violations, margins = compliance(stage, pvt, converged, corner, temp, vdd, violations, margins, explain)
    if checked(targets.mirrors) and "mirror_compliance" not in margins:  # one set of constraints per study
        margins["mirror_compliance"] = np.full(n, np.inf)
    return Result(design.architecture, corner, temp, vdd, pvt, summary, converged, req_names, violations, margins)


def loop_gain_at(design: Design, tech: Tech, corner: Corner, temp: float, vdd: float, targets: Targets, f):
    """The loop gain of one design inside the targets' amplifier at one PVT point.

    Parameters
    ----------
    design : Design
        One design (arrays of shape (1,)).
    corner, temp, vdd : the PVT point ([K], [V]).
    targets : Targets
        With an amplifier (`Targets.amplifier`).
    f : ndarray (nf,)
        Frequencies [Hz].

    Returns
    -------
    magnitude_db, phase_deg : ndarray (nf,)
        20 log10 |T| and the phase of T, unwrapped from 0 at DC (phase margin: 180 + phase
        where |T| = 1).
    """
    from .amplifier.inside import model as amplifier_model
    from .amplifier.response import loop_gain, poles_zeros

    stage = get_stage(design.architecture)
    idx = np.zeros(1, dtype=int)
    devs = devices_at(stage, design, tech, corner_shifts(tech, [corner]), np.array([float(temp)]), idx)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    vdd_arr = np.array([float(vdd)])
    nodes, _, _, op = rest_point(stage, devs, bias, vdd_arr, sensitivity=False)
    amp = targets.amplifier
    cc = amp.compensation(design.cc, idx)
    g, c, i_d, i_o, _ = amplifier_model(stage, devs, bias, tech, op, nodes, vdd_arr, targets.c_load, amp,
                                        targets.drive, cc=cc)
    mu_p, mu_z, h0, _, _ = poles_zeros(g, c, i_d, i_o)
    t0 = amp.beta * amp.gm1_for(cc) * np.abs(h0)
    logt, phase, _ = loop_gain(t0, mu_p, mu_z, np.asarray(f, dtype=float)[None, :])
    return 20.0 * logt[0], phase[0]


def monte_carlo_iq(design: Design, tech: Tech, corner: Corner, temp: float, vdd: float, samples: int,
                   rng: np.random.Generator, mirrors=None):
    """Iq of one design under random mismatch (Pelgrom), one exact solve per sample.

    With `mirrors` (study key -> `Mirror`, as `Targets.mirrors[architecture]`), the bias
    sources named there are mirrors whose deviations are drawn too: a sized mirror's input
    and output devices (Pelgrom), an unsized one's delta (normal, its sigma). They are drawn
    after the stage's devices, so the devices' draws do not depend on the mirrors.

    Parameters
    ----------
    design : Design
        One design (arrays of shape (1,)).
    corner, temp, vdd : the PVT point ([K], [V]).
    samples : int
        N.
    rng : numpy.random.Generator

    Returns
    -------
    iq : ndarray (N,) [A]
    ok : ndarray of bool (N,)
    """
    stage = get_stage(design.architecture)
    idx = np.zeros(samples, dtype=int)
    dvt, dbeta = {}, {}
    for spec in stage.TOPOLOGY.devices:
        mt = tech.mos(spec.polarity)
        w = float(np.asarray(design.w[spec.role]).ravel()[0])
        l = float(np.asarray(design.l[spec.role]).ravel()[0])
        dvt[spec.role], dbeta[spec.role] = _mm.sample(rng, mt.a_vt, mt.a_beta, w, l, samples)
    devs = devices_at(stage, design, tech, corner_shifts(tech, [corner] * samples), np.full(samples, temp), idx, dvt, dbeta)
    bias = {k: np.asarray(v, dtype=float)[idx] for k, v in design.bias.items()}
    vdd_arr = np.full(samples, float(vdd))
    sources = None
    if mirrors:
        draws = mirror_deviations(stage.TOPOLOGY, mirrors, tech, samples, rng)
        sources = source_states(stage.TOPOLOGY, mirrors, tech, devs, bias, vdd_arr, draws)
    _, ok, _, op = rest_point(stage, devs, bias, vdd_arr, sensitivity=False, sources=sources)
    return pull_down_current(stage, op), ok
