"""Builders shared by the stage tests: technologies whose every constant the test sets,
one- or many-element designs, and the solved rest point with each device's current.

Sizes are given in micrometres here only for readability of the tests; every object built
is SI, as the models expect.
"""
from __future__ import annotations

import math

import numpy as np

from models.devices.tech import Corner, ModelKind, MosTech, Tech
from models.evaluate import Design, corner_shifts, devices_at
from models.stages import get_stage

UM = 1e-6
T_TEST = 300.0  # K, temperature of every solve here (the techs below hold at it: tnom = T_TEST)
NO_CLM = math.inf  # va_per_l = inf: no channel-length modulation

# Every device role of the floating loop, and the stacked ones whose source is not on a rail
# (the only ones for which a bulk tie changes anything).
FLOAT_ROLES = ("mn_out", "mp_out", "mn_d1", "mn_d2", "mn_ctl", "mp_d1", "mp_d2", "mp_ctl")
STACKED = frozenset({"mn_d2", "mn_ctl", "mp_d2", "mp_ctl"})


def mos_tech(vt0=0.5, kp=100e-6, n=1.3, gamma=0.5, phi=0.8, va_per_l=NO_CLM, a_vt=5e-9, a_beta=1e-8,
             w_min=0.2 * UM, l_min=0.2 * UM) -> MosTech:
    """One polarity with test-chosen constants. No temperature drift is needed (solves at tnom)."""
    return MosTech(vt0=vt0, kp=kp, n=n, gamma=gamma, phi=phi, va_per_l=va_per_l, tc_vt=1.5e-3, mu_exp=-1.5,
                   a_vt=a_vt, a_beta=a_beta, cox=5e-3, cov=2e-10, w_min=w_min, l_min=l_min)


def make_tech(model: ModelKind, nmos: MosTech | None = None, pmos: MosTech | None = None) -> Tech:
    """A technology at T_TEST with only the tt corner; PMOS defaults to the NMOS constants
    (a mirror-symmetric process, so a mirrored design has mirrored rest currents)."""
    nmos = nmos or mos_tech()
    return Tech(name=f"test-{model.value}", model=model, nmos=nmos, pmos=pmos or nmos, grid=1e-9, tnom=T_TEST)


def make_design(architecture: str, sizes: dict, bias: dict, tied=frozenset()) -> Design:
    """A Design from role -> (w, l) in micrometres (scalars or arrays) and SI bias values."""
    w = {r: np.atleast_1d(np.asarray(wl[0], dtype=float)) * UM for r, wl in sizes.items()}
    l = {r: np.atleast_1d(np.asarray(wl[1], dtype=float)) * UM for r, wl in sizes.items()}
    b = {k: np.atleast_1d(np.asarray(v, dtype=float)) for k, v in bias.items()}
    n = max(max(np.size(a) for a in w.values()), max(np.size(a) for a in b.values()))
    w = {r: np.broadcast_to(a, (n,)).copy() for r, a in w.items()}
    l = {r: np.broadcast_to(a, (n,)).copy() for r, a in l.items()}
    b = {k: np.broadcast_to(a, (n,)).copy() for k, a in b.items()}
    return Design(architecture, w, l, b, frozenset(tied))


def floating_sizes(n_side: dict, p_side: dict | None = None) -> dict:
    """Floating-loop sizes from the N side {"out", "d1", "d2", "ctl": (w, l) um}; the P side
    mirrors it unless given."""
    p_side = p_side or n_side
    sizes = {f"mn_{k}": v for k, v in n_side.items()}
    sizes.update({f"mp_{k}": v for k, v in p_side.items()})
    return sizes


def solve_rest(design: Design, tech: Tech, vdd: float):
    """Rest point of every design at tt, T_TEST, supply vdd.

    Returns (stage, devs, bias, vdd_array, nodes, ok) as the stage's own solver gives them.
    """
    stage = get_stage(design.architecture)
    m = design.size
    devs = devices_at(stage, design, tech, corner_shifts(tech, [Corner.TT] * m), np.full(m, T_TEST), np.arange(m))
    bias = {k: np.asarray(v, dtype=float) for k, v in design.bias.items()}
    v = np.full(m, float(vdd))
    nodes, ok = stage.quiescent(devs, bias, v)
    return stage, devs, bias, v, nodes, ok


def device_currents(stage, devs, vdd, nodes) -> dict:
    """Frame current of every device at the solved nodes, evaluated with its Device object
    (output held at VDD/2, rails at vdd and 0, bulk on the rail unless the design ties it)."""
    v = {"vdd": vdd, "0": np.zeros_like(vdd), "out": 0.5 * vdd, **nodes}
    return {s.role: devs[s.role].current(v[s.g], v[s.d], v[s.s], v[s.rail]) for s in stage.TOPOLOGY.devices}


def gate_source(stage, nodes, vdd, role) -> np.ndarray:
    """Gate-source voltage magnitude of one device at the solved nodes [V]."""
    v = {"vdd": vdd, "0": np.zeros_like(vdd), "out": 0.5 * vdd, **nodes}
    spec = next(s for s in stage.TOPOLOGY.devices if s.role == role)
    return int(spec.polarity) * (v[spec.g] - v[spec.s])


def w_over_l(design: Design, role: str) -> np.ndarray:
    return np.asarray(design.w[role]) / np.asarray(design.l[role])


__all__ = ["UM", "T_TEST", "NO_CLM", "FLOAT_ROLES", "STACKED", "mos_tech", "make_tech", "make_design",
           "floating_sizes", "solve_rest", "device_currents", "gate_source", "w_over_l"]
