"""A sized device at its operating conditions: bulk ties, mismatch deviations, the EKV
constants worked out once, and cut-outs of a device to part of the batch.

All arrays are flat, shape (m,), one element per (design, PVT point) pair.
"""
from __future__ import annotations

import threading
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from . import mos as _mos
from . import table as _table
from .tech import ModelKind


@dataclass(slots=True)
class Device:
    """A sized device at its operating conditions, with optional mismatch deviations.

    Arrays broadcast with the flat batch. `tied` means the bulk sits on the source (own
    well), which removes the body effect. The EKV constants of the instance are worked
    out once, at construction, since a solve evaluates the same device many times.
    """

    mos: _mos.Mos
    w: np.ndarray
    l: np.ndarray
    tied: bool = False
    dvt: np.ndarray | float = 0.0
    dbeta: np.ndarray | float = 0.0
    ekv: tuple | None = field(init=False, repr=False, default=None)
    tab: object = field(init=False, repr=False, default=None)  # table kind: TableConstants

    def __post_init__(self) -> None:
        if self.mos.kind is ModelKind.EKV:
            self.ekv = _mos.ekv_constants(self.mos, self.w, self.l, self.dvt, self.dbeta)
        elif self.mos.kind is ModelKind.TABLE:
            self._flat_table()

    def _flat_table(self) -> None:
        """Table kind: flatten every per-element field to the batch length and work out the
        blending of the table slices once."""
        arrays = [self.w, self.l, self.dvt, self.dbeta]
        shape = _table._shape(self.mos, *arrays)
        self.w, self.l, self.dvt, self.dbeta = _table._flat(shape, *arrays)
        self.mos = _table._flat_mos(self.mos, shape)
        self.tab = _table.constants(self.mos, self.w, self.l, self.dvt, self.dbeta)

    @property
    def p(self) -> int:
        return self.mos.polarity

    def eval(self, vg, vd, vs, vb):
        """Frame current i and its derivatives with respect to the physical gate, drain and
        source voltages (source derivative includes the bulk when tied). Shape (m,)."""
        vb_eff = vs if self.tied else vb
        p = self.p
        if self.tab is not None:
            vb_b = np.broadcast_to(vb_eff, np.shape(self.w))
            i, gg, gd, gs = _table.partials_from(self.tab, p * (vg - vb_b), p * (vd - vb_b), p * (vs - vb_b))
        elif self.ekv is None:
            i, gg, gd, gs = _mos.current_partials(self.mos, self.w, self.l, vg, vd, vs, vb_eff, self.dvt, self.dbeta)
        elif p == 1:
            i, gg, gd, gs = _mos.ekv_terms(vg - vb_eff, vd - vb_eff, vs - vb_eff, *self.ekv)
        else:
            i, gg, gd, gs = _mos.ekv_terms(vb_eff - vg, vb_eff - vd, vb_eff - vs, *self.ekv)
        if self.tied:
            gs = -(gg + gd)
        if p == 1:
            return i, gg, gd, gs
        return i, -gg, -gd, -gs

    def current(self, vg, vd, vs, vb):
        return self.eval(vg, vd, vs, vb)[0]

    def diode(self, i, vs, vb):
        """Gate = drain voltage of this device diode-connected, carrying frame current i."""
        if self.tab is not None:
            vs, vb, i = np.broadcast_arrays(*(np.asarray(a, float) for a in (vs, vb, i)))
            return _table.diode_from(self.tab, self.mos, self.w, self.l, i, vs, vb, self.tied)
        if self.ekv is None:
            return _mos.diode_voltage(self.mos, self.w, self.l, i, vs, vs if self.tied else vb, self.dvt, self.dbeta)
        vg = self.gate_for(i, vs, vb, 0.0)
        vg = self.gate_for(i, vs, vb, vg - vs)  # with VDS = VGS in the length-modulation factor
        return _mos.refine_diode(vg, i, lambda v: self.eval(v, v, vs, vb)[:3])

    def gate_for(self, i, vs, vb, vds):
        """Gate voltage for frame current i in saturation (closed form)."""
        if self.tab is not None:
            vb_eff = np.broadcast_to(vs if self.tied else vb, np.shape(self.w))
            vs_b = np.broadcast_to(vs, np.shape(self.w))
            frame_vsb = self.p * (vs_b - vb_eff)
            vds = _table._vds_for(np.broadcast_to(vds, np.shape(self.w)), self.tab.table.span)
            ib = np.broadcast_to(i, np.shape(self.w))
            return vb_eff + self.p * _table.gate_from(self.tab, self.mos, self.w, self.l, ib, frame_vsb, vds)
        if self.ekv is not None:
            vb_eff = vs if self.tied else vb
            p = self.p
            return vb_eff + p * _mos.ekv_gate_sat(self.mos, p * (vs - vb_eff), i, vds, *self.ekv)
        return _mos.gate_voltage_sat(self.mos, self.w, self.l, i, vs, vs if self.tied else vb, vds, self.dvt, self.dbeta)

    def source_for(self, i, vg, vb, vds):
        """Source voltage for frame current i in saturation with the gate at vg."""
        if self.tab is not None:
            shape = np.shape(self.w)
            vds = _table._vds_for(np.broadcast_to(vds, shape), self.tab.table.span)
            return _table.source_from(self.tab, self.mos, self.w, self.l, np.broadcast_to(i, shape),
                                      np.broadcast_to(vg, shape), np.broadcast_to(vb, shape), vds, self.tied)
        return _mos.source_voltage_sat(self.mos, self.w, self.l, i, vg, vb, vds, self.dvt, self.dbeta, self.tied)

    def vdsat(self, i, slope=False):
        """Saturation voltage at frame current i [V] (see `mos.saturation_voltage`), with
        its derivative with respect to |i| when `slope`."""
        if self.tab is not None:
            ia = np.broadcast_to(np.abs(i), np.shape(self.w))
            return _table.saturation_from(self.tab, self.mos, self.w, self.l, ia, slope)
        return _mos.saturation_voltage(self.mos, self.w, self.l, i, slope)


def restricted(dev: Device, idx) -> Device:
    """The same device restricted to the batch elements idx (a slice or index array)."""
    if isinstance(idx, slice) and idx == slice(None):
        return dev
    if isinstance(idx, np.ndarray) and idx.size == np.size(dev.w) and idx.size and idx[-1] == idx.size - 1 \
            and idx[0] == 0:
        return dev  # idx is the whole batch (index sets are sorted, so first/last fix it)
    def pick(a):
        a = np.asarray(a)
        return a[idx] if a.ndim else a

    m = dev.mos
    table = None if m.table is None else _table.TableSelect(m.table.table, pick(m.table.slot), pick(m.table.temp))
    mos_sub = _mos.Mos(m.polarity, m.kind, pick(m.vt0), pick(m.kp), m.n, m.gamma, m.phi, pick(m.ut), m.va_per_l,
                       table)
    return Device(mos_sub, pick(dev.w), pick(dev.l), dev.tied, pick(dev.dvt), pick(dev.dbeta))


class DeviceSubset(Mapping):
    """Devices restricted to the batch elements idx, each cut out when first used (a
    solver step usually needs only a few of the stage's devices)."""

    def __init__(self, devices, idx):
        self._devices, self._idx, self._cut = devices, idx, {}

    def __getitem__(self, role: str) -> Device:
        dev = self._cut.get(role)
        if dev is None:
            dev = self._cut[role] = restricted(self._devices[role], self._idx)
        return dev

    def __iter__(self):
        return iter(self._devices)

    def __len__(self) -> int:
        return len(self._devices)


_recent = threading.local()


def subset(devices, idx) -> DeviceSubset:
    """All devices restricted to the batch elements idx (cut out on first use).

    An iteration hands the same index array to its function step after step; the last
    subset of each thread is kept, so those steps share one set of cut-out devices.
    """
    last = getattr(_recent, "last", None)
    if last is not None and last[0] is devices and last[1] is idx:
        return last[2]
    sub = DeviceSubset(devices, idx)
    _recent.last = (devices, idx, sub)
    return sub
