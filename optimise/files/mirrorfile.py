"""The bias sources of a study: which of them are current mirrors, and how each is described.

Without a [mirrors] table every bias source is ideal (no mismatch, infinite output
resistance), as before. Per architecture, each source may be described in one of two forms
(sizes in micrometres like the device tables; suffixed strings allowed):

    [mirrors.floating-loop]
    ib_n = { w = 8, l = 2 }                              # sized: the mirror's output device
    ib_p = { w = 4, l = 2, polarity = "n" }              # polarity optional, checked
    ib_ctl_top = { sigma_pct = 0.5, r_out = "20meg" }    # unsized: sigma and output resistance
    ib_ctl_bot = { sigma_pct = 0.5, r_out = "20meg", v_ref = 0.6, v_min = 0.2 }

Source names: floating-loop ib_n, ib_p, ib_ctl_top (from the supply into MP_OUT's gate),
ib_ctl_bot (out of MN_OUT's gate to ground); fixed-bias and follower ib_top, ib_bot.
A source from the supply is a PMOS mirror, one to ground an NMOS mirror. What follows from
each form is in `models.circuit.mirrors`: a sized mirror is 1:1 with its own input diode
(area 2 W L), its sigma is Pelgrom's, its output resistance 1/gds at the bias current and
its compliance voltage the output device's VDSsat; the unsized form delivers
I0 (1 + delta) + (V_across - v_ref) / r_out with v_ref default 0 V (the ideal source with
r_out in parallel) and checks v_min only when given.
"""
from __future__ import annotations

import math

from models.circuit.mirrors import Mirror, source_keys, source_polarity
from models.devices.tech import Polarity, Tech
from models.stages import get_stage

from .errors import InputError
from .tables import build, check_keys, closest, micrometres, number, show, sub_table
from .units import format_eng

SIZED_KEYS = ("w", "l", "polarity")
UNSIZED_KEYS = ("sigma_pct", "r_out", "v_ref", "v_min")
# The largest sigma an unsized mirror may claim [%]: beyond it the linear sigma means
# nothing ("common practice, no source": matched mirrors are a fraction of a percent to a
# few percent).
SIGMA_CEILING_PCT = 50.0


def load_mirrors(where: str, data: dict, architectures, tech: Tech) -> dict:
    """The [mirrors] table of a study: architecture -> source key -> Mirror.

    Parameters
    ----------
    where : str
        The study file, for messages.
    data : dict
        The parsed study.
    architectures : sequence of str
        The architectures the study names; a [mirrors.ARCH] table for another is refused.
    tech : Tech
        For the minimum sizes of sized mirrors.
    """
    table = sub_table(where, "", "mirrors", data.get("mirrors", {}))
    out = {}
    for arch, sources in table.items():
        if arch not in architectures:
            raise InputError(where, f"[mirrors.{arch}] names an architecture the study does not use",
                             ", ".join(architectures), closest(arch, architectures))
        topo = get_stage(arch).TOPOLOGY
        keys = source_keys(topo)
        by_key = {key: next(s for s in topo.sources if s.name == name) for name, key in keys.items()}
        sources = sub_table(where, "mirrors", arch, sources)
        check_keys(where, f"mirrors.{arch}", sources, tuple(by_key),
                   hint="each bias source of the architecture, by these names")
        out[arch] = {key: _mirror(where, f"mirrors.{arch}.{key}", by_key[key], spec, tech)
                     for key, spec in sources.items()}
    return out


def _mirror(where, table, src, spec, tech) -> Mirror:
    parent, _, key = table.rpartition(".")
    spec = sub_table(where, parent, key, spec)
    sized = any(k in spec for k in ("w", "l"))
    unsized = [k for k in spec if k in UNSIZED_KEYS]
    if sized and unsized:
        raise InputError(where, f"[{table}] mixes the sized form (w, l) with {', '.join(unsized)}",
                         "either w and l (and polarity), or sigma_pct and r_out (and v_ref, v_min)",
                         "a sized mirror's sigma and output resistance follow from the technology")
    pol = source_polarity(src)
    pol_name = "p" if pol == Polarity.P else "n"
    if sized:
        check_keys(where, table, spec, SIZED_KEYS, ("w", "l"))
        if "polarity" in spec and spec["polarity"] not in ("n", "p"):
            raise InputError(where, f"[{table}] polarity = {show(spec['polarity'])} is not allowed", "\"n\" or \"p\"")
        if spec.get("polarity", pol_name) != pol_name:
            side = "from the supply" if pol == Polarity.P else "to ground"
            raise InputError(where, f"[{table}] polarity = {show(spec['polarity'])} does not fit this source",
                             f"\"{pol_name}\"", f"the source runs {side}, so its mirror's output device is "
                                                f"{'a PMOS' if pol == Polarity.P else 'an NMOS'}")
        mt = tech.mos(pol)
        kw = {}
        for k, minimum in (("w", mt.w_min), ("l", mt.l_min)):
            value = micrometres(where, table, k, spec[k])
            if not value >= minimum * (1 - 1e-9):
                raise InputError(where, f"[{table}] {k} = {value * 1e6:g} um is below the technology minimum",
                                 f">= {minimum * 1e6:g} um ({tech.name})")
            kw[k] = value
        return build(where, table, Mirror, kw)
    check_keys(where, table, spec, UNSIZED_KEYS, ("sigma_pct", "r_out"),
               hint="or the sized form: w and l of the mirror's output device in um")
    sigma = number(where, table, "sigma_pct", spec["sigma_pct"], "%")
    if not 0 <= sigma <= SIGMA_CEILING_PCT:
        raise InputError(where, f"[{table}] sigma_pct = {show(spec['sigma_pct'])} is not allowed",
                         f"0 <= sigma_pct <= {SIGMA_CEILING_PCT:g} (percent of the bias current)")
    r_out = number(where, table, "r_out", spec["r_out"], "ohm", allow_inf=True)
    if not r_out > 0:
        raise InputError(where, f"[{table}] r_out = {show(spec['r_out'])} is not allowed",
                         "> 0 ohm (\"inf\" for an ideal output resistance)")
    kw = {"sigma_pct": sigma, "r_out": r_out}
    for k in ("v_ref", "v_min"):
        if k in spec:
            v = number(where, table, k, spec[k], "V")
            if v < 0:
                raise InputError(where, f"[{table}] {k} = {show(spec[k])} is not allowed", ">= 0 V")
            kw[k] = v
    if math.isinf(r_out) and kw.get("v_ref", 0.0) != 0.0:
        raise InputError(where, f"[{table}] v_ref = {show(spec['v_ref'])} has no effect with r_out = inf",
                         "v_ref only with a finite r_out")
    return build(where, table, Mirror, kw)


def describe_mirrors(mirrors: dict, architectures) -> list[str]:
    """One line per architecture and source saying what feeds it (for reports)."""
    lines = []
    for arch in architectures:
        keys = source_keys(get_stage(arch).TOPOLOGY).values()
        table = mirrors.get(arch, {})
        for key in keys:
            lines.append(f"{arch} {key}: " + (_describe(table[key]) if key in table else "ideal current source"))
    return lines


def _describe(m: Mirror) -> str:
    if m.sized:
        return f"mirror, output device W = {m.w * 1e6:g} um, L = {m.l * 1e6:g} um (1:1, own input diode)"
    r = "infinite" if math.isinf(m.r_out) else format_eng(m.r_out, "ohm")
    extra = f", compliance {format_eng(m.v_min, 'V')}" if m.v_min > 0 else ""
    return f"sigma {m.sigma_pct:g} %, r_out {r}, V_ref {format_eng(m.v_ref, 'V')}{extra}"
