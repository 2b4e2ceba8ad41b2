"""Topology records of an output stage: devices by role, bias sources and resistors, and
the node list the nodal system and the netlists share.

Node names: "vdd" (supply), "0" (ground), "out" (output); every other name is internal.
"""
from __future__ import annotations

from dataclasses import dataclass

from ..devices.tech import Polarity

RAILS = ("vdd", "0")


@dataclass(frozen=True, slots=True)
class DeviceSpec:
    """One transistor of a topology: role name, polarity and terminal nodes."""

    role: str
    polarity: Polarity
    d: str
    g: str
    s: str

    @property
    def rail(self) -> str:
        """Default bulk node: ground for NMOS, supply for PMOS."""
        return "0" if self.polarity == Polarity.N else "vdd"


@dataclass(frozen=True, slots=True)
class SourceSpec:
    """An ideal DC current source of value `bias` pushing current from node a to node b."""

    name: str
    bias: str
    a: str
    b: str


@dataclass(frozen=True, slots=True)
class ResistorSpec:
    """A resistor of value `bias` (ohm) between nodes a and b."""

    name: str
    bias: str
    a: str
    b: str


@dataclass(frozen=True, slots=True)
class Topology:
    """Netlist of a stage at rest.

    `drive` is the node into which the amplifier's feedback injects current (or whose
    voltage it sets, for a follower); at rest that current is zero and the output sits
    at VDD/2 with no net output current.
    """

    devices: tuple[DeviceSpec, ...]
    sources: tuple[SourceSpec, ...]
    resistors: tuple[ResistorSpec, ...] = ()
    drive: str = "gp"

    @property
    def roles(self) -> tuple[str, ...]:
        return tuple(d.role for d in self.devices)

    def spec(self, role: str) -> DeviceSpec:
        """The device record of a role."""
        for d in self.devices:
            if d.role == role:
                return d
        raise KeyError(role)

    @property
    def nodes(self) -> tuple[str, ...]:
        """Internal nodes (unknowns of the nodal system), in first-seen order."""
        seen: list[str] = []
        for dev in self.devices:
            for node in (dev.d, dev.g, dev.s):
                if node not in RAILS and node != "out" and node not in seen:
                    seen.append(node)
        for el in self.sources + self.resistors:
            for node in (el.a, el.b):
                if node not in RAILS and node != "out" and node not in seen:
                    seen.append(node)
        return tuple(seen)
