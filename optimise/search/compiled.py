"""A compiled drop-in for the table kind's interpolation, the hot loop of every evaluation on
a table technology.

`models.devices.table_data._forward` evaluates the card's tables at each element: up to
eight bicubic Hermite cells, blended over length, temperature and VSB. In numpy that is
about a hundred array operations per call on arrays of the whole batch, some 1 us per
element. The same arithmetic as one compiled loop over the elements (numba) takes about a
seventh of that. `models/` stays numpy and scipy only: this module hands the loop to
`table_data.set_kernel`, and the numpy function remains the reference the tests hold the
compiled one against (relative 1e-12 on the current and its derivatives).

The loop follows `_forward` statement by statement; divisions by the cell widths are
multiplications by their reciprocals (one rounding apart). numba compiles it at the first
call of a process and caches the machine code beside this file (``__pycache__``), so
later processes load it. Without numba (or with STAGEFRONT_NO_COMPILED=1 in the
environment) nothing is installed and the numpy function runs: same results to that
tolerance, slower.
"""
from __future__ import annotations

import os

import numpy as np

from models.devices import table_data

try:  # numba is a dependency; a broken or missing install leaves the numpy reference
    import numba
except ImportError:  # pragma: no cover - exercised only where numba is absent
    numba = None

_installed = False


def _loop(cells, vt_nodes, dvt_nodes, wvt_nodes, wlog_nodes, dwvt_nodes, vgs_grid, vds_grid, vsb_grid,
          base, weight, narrow, scale, ut, vgs, vds, vsb, out_i, out_g, out_d, out_s):
    """Per element: `table_data._forward`'s frame current and its VGS, VDS, VSB derivatives."""
    nvgs, nvds, nvsb = vgs_grid.shape[0], vds_grid.shape[0], vsb_grid.shape[0]
    hg = vgs_grid[1] - vgs_grid[0]
    rhg = 1.0 / hg
    rspan = 1.0 / vds_grid[nvds - 1]
    rtop = 1.0 / vsb_grid[nvsb - 1]
    v0g = vgs_grid[0]
    for e in range(vgs.shape[0]):
        vd = vds[e]
        vdp = max(vd, 0.0)
        idd = min(max(int(np.floor(np.sqrt(vdp * rspan) * (nvds - 1))), 0), nvds - 2)
        d0 = vds_grid[idd]
        rhd = 1.0 / (vds_grid[idd + 1] - d0)
        sd = min(max((vd - d0) * rhd, 0.0), 1.0)
        vs = vsb[e]
        isb = min(max(int(np.floor(np.sqrt(max(vs, 0.0) * rtop) * (nvsb - 1))), 0), nvsb - 2)
        s0 = vsb_grid[isb]
        hsb = vsb_grid[isb + 1] - s0
        rhsb = 1.0 / hsb
        rs_raw = (vs - s0) * rhsb
        rs = min(max(rs_raw, 0.0), 1.0)
        r2 = rs * rs
        r3 = r2 * rs
        h00, h10, h01, h11 = 1 - 3 * r2 + 2 * r3, rs - 2 * r2 + r3, 3 * r2 - 2 * r3, r3 - r2
        fw = narrow[e]
        y = y_g = y_d = y_s = 0.0
        for j in range(base.shape[1]):
            wgt = weight[e, j]
            b0 = base[e, j] * nvsb + isb
            o0 = vt_nodes[b0] + fw * wvt_nodes[b0]
            o1 = vt_nodes[b0 + 1] + fw * wvt_nodes[b0 + 1]
            v0 = dvt_nodes[b0] * hsb + fw * dwvt_nodes[b0] * hsb
            v1 = dvt_nodes[b0 + 1] * hsb + fw * dwvt_nodes[b0 + 1] * hsb
            vt_q = h00 * o0 + h10 * v0 + h01 * o1 + h11 * v1
            dvt_q = ((6 * r2 - 6 * rs) * (o0 - o1) + (1 - 4 * rs + 3 * r2) * v0 + (3 * r2 - 2 * rs) * v1) * rhsb
            slope = 0.0
            val0 = val1 = 0.0
            for n in range(2):
                bj = b0 + n
                xg = (vgs[e] - vt_q + vt_nodes[bj] - v0g) * rhg
                ig = min(max(int(np.floor(xg)), 0), nvgs - 2)
                tg = xg - ig
                g = min(max(tg, 0.0), 1.0)
                c = cells[(bj * (nvds - 1) + idd) * (nvgs - 1) + ig]
                # Horner in the VDS coordinate per VGS power (and its derivative), then in VGS.
                p0 = c[0] + sd * (c[4] + sd * (c[8] + sd * c[12]))
                p1 = c[1] + sd * (c[5] + sd * (c[9] + sd * c[13]))
                p2 = c[2] + sd * (c[6] + sd * (c[10] + sd * c[14]))
                p3 = c[3] + sd * (c[7] + sd * (c[11] + sd * c[15]))
                q0 = c[4] + sd * (2.0 * c[8] + 3.0 * sd * c[12])
                q1 = c[5] + sd * (2.0 * c[9] + 3.0 * sd * c[13])
                q2 = c[6] + sd * (2.0 * c[10] + 3.0 * sd * c[14])
                q3 = c[7] + sd * (2.0 * c[11] + 3.0 * sd * c[15])
                d_g = (p1 + g * (2.0 * p2 + 3.0 * g * p3)) * rhg
                d_d = (q0 + g * (q1 + g * (q2 + g * q3))) * rhd
                val = p0 + g * (p1 + g * (p2 + g * p3)) + d_g * (tg - g) * hg + fw * wlog_nodes[bj]
                wj = ((1.0 - rs) if n == 0 else rs) * wgt
                y += wj * val
                slope += wj * d_g
                y_d += wj * d_d
                if n == 0:
                    val0 = val
                else:
                    val1 = val
            y_g += slope
            y_s += wgt * (val1 - val0) * rhsb - slope * dvt_q
        y += y_s * (rs_raw - rs) * hsb
        ru = 1.0 / ut[e]
        base_i = scale[e] * np.exp(y)
        i = base_i * -np.expm1(-vdp * ru)
        out_i[e] = i
        out_g[e] = i * y_g
        out_d[e] = i * y_d + base_i * np.exp(-vdp * ru) * ru
        out_s[e] = i * y_s


_compiled = numba.njit(cache=True, nogil=True)(_loop) if numba is not None else None


def forward(c: table_data.TableConstants, vgs, vds, vsb):
    """`table_data._forward` by the compiled loop: the same arguments and results."""
    t = c.table
    cells, vt_nodes, dvt_nodes, (wvt, wlog, dwvt) = t.cells()
    m = c.scale.shape[0]
    vgs, vds, vsb = (np.ascontiguousarray(np.broadcast_to(np.asarray(a, dtype=float), (m,))) for a in (vgs, vds, vsb))
    out = tuple(np.empty(m) for _ in range(4))
    _compiled(cells, vt_nodes.ravel(), dvt_nodes.ravel(), wvt.ravel(), wlog.ravel(), dwvt.ravel(), t.vgs, t.vds,
              t.vsb, np.ascontiguousarray(c.base), np.ascontiguousarray(c.weight), c.narrow, c.scale, c.ut,
              vgs, vds, vsb, *out)
    return out


def install() -> bool:
    """Hand the compiled loop to the table kind; True when it is in use. Idempotent."""
    global _installed
    if _installed:
        return True
    if _compiled is None or os.environ.get("STAGEFRONT_NO_COMPILED"):
        return False
    table_data.set_kernel(forward)
    _installed = True
    return True
