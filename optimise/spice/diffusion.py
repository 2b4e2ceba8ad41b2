"""Source and drain geometry of netlisted transistors: AD, AS, PD and PS from the
technology's diffusion extension (`models.devices.tech.Tech.extension`).

Each diffusion is a rectangle W wide reaching the extension E beyond the gate:
area W x E, perimeter 2 (W + E) (the gate-side edge included, as SPICE's PD/PS count
it by default; `models.devices.tech.Tech.diffusion`, which the junction capacitances of
the small-signal model use too). Without them ngspice warns per device and leaves the
junction capacitances at zero. Numbers are written with 12 significant digits, so no
binary noise of the products reaches the deck.
"""
from __future__ import annotations

import re

from models.devices.tech import Polarity, Tech

_WIDTH = re.compile(r"\sw=([0-9.eE+-]+)")


def _num(x: float) -> str:
    return format(float(x), ".12g")


def geometry(w: float, extension: float) -> str:
    """` ad=.. as=.. pd=.. ps=..` for one device of width w [m] and extension [m] (the
    rectangle of `Tech.diffusion`)."""
    area, perimeter = _num(w * extension), _num(2.0 * (w + extension))
    return f" ad={area} as={area} pd={perimeter} ps={perimeter}"


def add_geometry(subckt: str, stage, tech: Tech, device_name) -> str:
    """The subcircuit text with AD/AS/PD/PS appended to each transistor line.

    Parameters
    ----------
    subckt : str
        ``.subckt`` text whose transistor lines carry ``w=``.
    stage : architecture module (its TOPOLOGY names each device's polarity)
    tech : Tech
    device_name : callable
        Role -> instance name as the netlist writes it (``M_MN_OUT``).
    """
    polarity_of: dict[str, Polarity] = {device_name(d.role): d.polarity for d in stage.TOPOLOGY.devices}
    out = []
    for line in subckt.splitlines():
        name = line.split(" ", 1)[0]
        m = _WIDTH.search(line)
        if name in polarity_of and m and " ad=" not in line:
            line += geometry(float(m.group(1)), tech.extension(polarity_of[name]))
        out.append(line)
    return "\n".join(out)
