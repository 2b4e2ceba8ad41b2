"""Device tables of a SPICE model card (the `table` model kind): ngspice sweeps every
polarity, corner section, temperature and length over the frame voltages VGS, VDS and VSB
in one DC analysis per (section, temperature), and the arrays go to a `.npz` file beside the
technology file.

One deck holds, per polarity and VSB value, a source node held at VSB above the bulk, a gate
and a drain node following the two swept sources through unit-gain controlled sources
(VGS uniform; VDS = span u^2 with u swept uniformly, dense near 0), and one device per
length at the reference width. ngspice's own instance values (id, gm, gds, gmbs and the
capacitances cgg, cgs, cgd, cdd) are saved for every device and point. Identical corner
sections of one polarity (e.g. the NMOS of ff and fs) are stored once. A second, narrow
width (its drain current only) gives the narrow-width correction (`models.devices.table_data`).
Currents and conductances are stored as float32, the capacitances per width in fF/um as
float16 (three significant digits, ample for an early-design estimate).
"""
from __future__ import annotations

import math
import threading
from concurrent.futures import ThreadPoolExecutor, wait

import numpy as np

from models.devices.constants import ZERO_CELSIUS
from models.devices.table_data import QUANTITIES, PolarityTable
from models.devices.tech import Corner, Polarity

from ..spice import ngspice, process
from ..spice import testbench as tb

TEMPS_C = (-40.0, 27.0, 125.0)  # default temperatures [degC]
N_LENGTHS = 12  # default number of lengths, log-spaced from the shortest to the longest
W_REF = 10e-6  # m, reference width
VGS_STEP = 0.1  # V (Hermite with ngspice's gm: interpolation error below 0.1 % of Id)
VGS_BELOW = 0.2  # V tabulated below VGS = 0 (cut-off)
N_VDS = 13
N_VSB = 7
FORMAT = 1  # version of the array file layout
# Time limit of one table deck per device x grid point [s]: the invented BSIM3 card's deck
# (84 to 336 devices x 273 points) measured here takes 0.02 to 0.05 ms per device-point on
# its own and up to 0.5 ms with two decks at once on a shared, loaded 2-core machine; twice
# that worst figure, plus process.START_S (12 lengths: about 100 s, 3 lengths: about 30 s).
TABLE_S_PER_POINT = 1e-3


def default_lengths(lmin: float, lmax: float, count: int = N_LENGTHS, grid: float = 5e-9) -> tuple[float, ...]:
    """`count` lengths log-spaced from lmin to lmax, on the drawing grid."""
    raw = np.geomspace(lmin, lmax, count)
    snapped = np.unique(np.round(raw / grid) * grid)
    return tuple(float(x) for x in snapped)


def grid_axes(span: float):
    """(vgs, vds, vsb) node voltages for a table covering frame voltages up to `span` [V]."""
    top = math.ceil(span / VGS_STEP) * VGS_STEP
    n_vgs = int(round((top + VGS_BELOW) / VGS_STEP)) + 1
    vgs = -VGS_BELOW + VGS_STEP * np.arange(n_vgs)
    vds = top * (np.arange(N_VDS) / (N_VDS - 1)) ** 2
    vsb = top * (np.arange(N_VSB) / (N_VSB - 1)) ** 2  # dense near 0, where the body effect bends most
    return vgs, vds, vsb


def _deck(models: tb.ModelSource, corner: Corner, temp_c: float, lengths, w_ref: float, axes, w_narrow: float):
    vgs, vds, vsb = axes
    top = float(vds[-1])
    lines = [f"stagefront device tables: {corner.value}, {temp_c:g} degC",
             f".options {tb.netlist.OPTIONS}", f".temp {temp_c!r}", models.reference(corner),
             "V_GS vgs 0 dc 0", "V_U u 0 dc 0", f"B_DS vds 0 v = {top!r} * v(u) * v(u)"]
    saves, names = [], {}
    for pol, model in ((1, models.nmos), (-1, models.pmos)):
        tag = "n" if pol == 1 else "p"
        for j, v in enumerate(vsb):
            s, g, d = f"s{tag}{j}", f"g{tag}{j}", f"d{tag}{j}"
            lines += [f"V_S{tag}{j} {s} 0 dc {pol * float(v)!r}", f"E_G{tag}{j} {g} {s} vgs 0 {float(pol)!r}",
                      f"E_D{tag}{j} {d} {s} vds 0 {float(pol)!r}"]
            for k, length in enumerate(lengths):
                name = f"m{tag}{j}x{k}"
                lines.append(f"{name} {d} {g} {s} 0 {model} w={w_ref!r} l={float(length)!r}")
                names[(pol, j, k)] = name
                saves += [f"@{name}[{q}]" for q in QUANTITIES]
                # The narrow width: its threshold and current factor at this VSB.
                name = f"m{tag}{j}nx{k}"
                lines.append(f"{name} {d} {g} {s} 0 {model} w={w_narrow!r} l={float(length)!r}")
                names[(pol, "narrow", j, k)] = name
                saves.append(f"@{name}[id]")
    for start in range(0, len(saves), 8):
        lines.append(".save " + " ".join(saves[start:start + 8]))
    lines.append(".save v(vgs) v(vds)")
    step_u = 1.0 / (len(vds) - 1)
    lines += [f".dc V_GS {float(vgs[0])!r} {float(vgs[-1]) + 1e-3 * VGS_STEP!r} {VGS_STEP!r} "
              f"V_U 0 {1.0 + 1e-3 * step_u!r} {step_u!r}", ".end"]
    return "\n".join(lines), names


def deck_limit(lengths, axes) -> float:
    """Wall-clock limit [s] of one table deck: both polarities, every VSB and length at two
    widths, over the VGS x VDS grid."""
    vgs, vds, vsb = axes
    return process.time_limit(2 * len(vsb) * len(lengths) * 2 * len(vds) * len(vgs), TABLE_S_PER_POINT)


def _sweep(models, corner, temp_c, lengths, w_ref, axes, timeout, w_narrow, log=None):
    """One (section, temperature): polarity -> dict of arrays (n_lengths, n_vsb, n_vds, n_vgs),
    and "id_narrow", the current at the narrow width, of the same shape."""
    vgs, vds, vsb = axes
    deck, names = _deck(models, corner, temp_c, lengths, w_ref, axes, w_narrow)
    what = f"device tables, {corner.value}, {temp_c:g} degC"
    progress = (lambda t: log(f"    ... {what}: ngspice still running after {t:.0f} s (limit {timeout:.0f} s)")) \
        if log else None
    res = ngspice.run(deck, timeout=timeout, progress=progress)
    shape = (len(vds), len(vgs))
    x_g = ngspice.vector(res, "v(vgs)")
    x_d = ngspice.vector(res, "v(vds)")
    if x_g.size != shape[0] * shape[1]:
        raise ngspice.NgspiceError(f"device tables: ngspice returned {x_g.size} points, expected "
                                   f"{shape[0] * shape[1]} ({corner.value}, {temp_c:g} degC)")
    if not (np.allclose(x_g.reshape(shape), vgs[None, :], atol=1e-9)
            and np.allclose(x_d.reshape(shape), vds[:, None], atol=1e-9)):
        raise ngspice.NgspiceError("device tables: the swept voltages are not the grid asked for")
    out = {}
    for pol in (1, -1):
        arrays = {q: np.empty((len(lengths), len(vsb)) + shape) for q in QUANTITIES}
        for j in range(len(vsb)):
            for k in range(len(lengths)):
                name = names[(pol, j, k)]
                for q in QUANTITIES:
                    arrays[q][k, j] = ngspice.vector(res, f"@{name}[{q}]").reshape(shape)
        arrays["id_narrow"] = np.stack([np.stack([ngspice.vector(res, f"@{names[(pol, 'narrow', j, k)]}[id]")
                                                  .reshape(shape) for j in range(len(vsb))])
                                        for k in range(len(lengths))])
        for q in ("id", "gm", "gds", "gmbs", "id_narrow"):
            arrays[q] = np.abs(arrays[q])  # frame magnitudes (PMOS currents come out negative)
        out[pol] = arrays
    return out


def tabulate(models: tb.ModelSource, lengths, span: float, temps_c=TEMPS_C, w_ref: float = W_REF,
             w_narrow: float = 1e-6, jobs: int = 2, log=lambda s: None,
             timeout: float | None = None) -> dict[Polarity, PolarityTable]:
    """Tabulate the card: polarity -> PolarityTable (see the module notes).

    Parameters
    ----------
    models : ModelSource
        The user's card; every corner section it has (a plain card: tt only).
    lengths : sequence of float
        Drawn lengths [m], rising.
    span : float
        Largest frame voltage tabulated [V] (rounded up to the VGS step).
    temps_c : sequence of float
        Temperatures [degC], rising.
    w_ref : float
        Reference width [m]; the current scales as W / w_ref.
    w_narrow : float
        A second, narrow width [m] (drain current only): its threshold shift and current
        factor against w_ref at each VSB give the narrow-width correction, linear in 1/W.
    jobs : int
        ngspice processes run at once.
    log : callable
        Receives a progress line per sweep started and finished, and one every 10 s while
        a sweep runs.
    timeout : float, optional
        Wall-clock limit of each ngspice run [s] (default: `deck_limit`).

    An interrupt (Ctrl-C, or SIGTERM under `process.terminate_as_interrupt`) stops the
    runs not started, kills those running and lets each remove its temporary folder
    before it propagates.
    """
    axes = grid_axes(span)
    timeout = deck_limit(lengths, axes) if timeout is None else timeout
    corners = models.corners(None) if models.sections else (Corner.TT,)
    runs = [(c, t) for c in corners for t in temps_c]
    log(f"device tables: {len(runs)} ngspice runs ({len(corners)} corner sections x {len(temps_c)} temperatures), "
        f"{len(lengths)} lengths x {len(axes[2])} VSB x {len(axes[1])} VDS x {len(axes[0])} VGS per polarity")
    results, stop = {}, threading.Event()

    def one(run):
        if stop.is_set():
            return
        corner, temp_c = run
        log(f"  {corner.value}, {temp_c:g} degC started (time limit {timeout:.0f} s)")
        results[run] = _sweep(models, corner, temp_c, lengths, w_ref, axes, timeout, w_narrow, log)
        log(f"  {corner.value}, {temp_c:g} degC done ({len(results)}/{len(runs)})")

    pool = ThreadPoolExecutor(max_workers=max(1, jobs))
    futures = [pool.submit(one, run) for run in runs]
    try:
        for f in futures:
            f.result()
    except BaseException:  # an interrupt or a failed run: stop the others before it propagates
        stop.set()
        for f in futures:
            f.cancel()
        while not all(f.done() for f in futures):
            process.stop_all()
            wait(futures, timeout=0.05)
        raise
    finally:
        pool.shutdown(wait=True)
    tables = {}
    for pol in (Polarity.N, Polarity.P):
        slots, stacks = {}, []
        keys = QUANTITIES + ("id_narrow",)
        for corner in corners:
            stack = {q: np.stack([results[(corner, t)][int(pol)][q] for t in temps_c]) for q in keys}
            same = next((k for k, s in enumerate(stacks) if all(np.array_equal(s[q], stack[q]) for q in keys)), None)
            if same is None:
                stacks.append(stack)
                same = len(stacks) - 1
            slots[corner.value] = same
        data = {q: np.stack([s[q] for s in stacks]).astype(np.float32) for q in keys}
        tables[pol] = PolarityTable(axes[0], axes[1], axes[2], np.asarray(lengths, dtype=float),
                                    np.asarray(temps_c, dtype=float) + ZERO_CELSIUS, float(w_ref), slots, data,
                                    float(w_narrow))
    return tables


def save_tables(path, tables: dict[Polarity, PolarityTable], meta: dict) -> bytes:
    """The `.npz` bytes of both polarities' tables (no pickles; written by the caller)."""
    import io

    arrays = {"format": np.array(FORMAT)}
    for pol, tag in ((Polarity.N, "nmos"), (Polarity.P, "pmos")):
        t = tables[pol]
        arrays[f"{tag}_vgs"], arrays[f"{tag}_vds"], arrays[f"{tag}_vsb"] = t.vgs, t.vds, t.vsb
        arrays[f"{tag}_lengths"], arrays[f"{tag}_temps"] = t.lengths, t.temps
        arrays[f"{tag}_w_ref"] = np.array(t.w_ref)
        arrays[f"{tag}_w_narrow"] = np.array(t.w_narrow)
        arrays[f"{tag}_id_narrow"] = t.data["id_narrow"]
        names = sorted(t.slots)
        arrays[f"{tag}_corners"] = np.array(names)
        arrays[f"{tag}_slots"] = np.array([t.slots[c] for c in names], dtype=np.int64)
        for q in QUANTITIES:
            if q.startswith("c"):  # F -> fF/um of width
                arrays[f"{tag}_{q}"] = (t.data[q] / t.w_ref * 1e9).astype(np.float16)
            else:
                arrays[f"{tag}_{q}"] = t.data[q].astype(np.float32)
    for key, value in meta.items():
        arrays[f"meta_{key}"] = np.array(value)
    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()
