"""`stagefront calibrate --tables`: a table technology, the card tabulated by ngspice
(`optimise.calibrate.tables`) beside the EKV summary fit of `calibrate`, written as a TOML
file with `model = "table"` and an `.npz` array file of the same stem.

The EKV constants stay in the file's [nmos] and [pmos] tables as a summary of the card (the
start values of the table kind's Newton steps, and the threshold a few stage requirements
quote); every current, conductance and capacitance comes from the tables.
"""
from __future__ import annotations

import json
import math
import os
from pathlib import Path

from ..files.atomic import write_bytes, write_text
from ..files.errors import InputError
from ..files.units import format_eng, parse_quantity
from . import tables as tab


# The most lengths and temperatures tabulated: each length is 28 devices of every deck and
# each temperature one more deck per corner section ("common practice, no source").
MAX_TABLE_LENGTHS = 40
MAX_TEMPS = 10


def table_options(args, lmin: float, vdd: float):
    """Check the --tables options before any simulation: (lengths, temps_c, w_ref, w_narrow)."""
    try:
        if args.table_lengths:
            lengths = tuple(sorted(parse_quantity(x, "m") for x in args.table_lengths.replace(",", " ").split()))
        else:
            lmax = parse_quantity(args.lmax, "m") if args.lmax else 10.0 * lmin
            if not lmax > lmin:
                raise InputError("--lmax", f"{format_eng(lmax, 'm')} is not above --lmin {format_eng(lmin, 'm')}")
            lengths = tab.default_lengths(lmin, lmax)
        temps = (tuple(sorted(float(x) for x in args.temps.replace(",", " ").split())) if args.temps
                 else tab.TEMPS_C)
        w_ref = parse_quantity(args.wref, "m")
        w_narrow = parse_quantity(args.wnarrow, "m")
    except (TypeError, ValueError) as err:
        raise InputError("calibrate --tables", str(err)) from None
    if not 2 <= len(lengths) <= MAX_TABLE_LENGTHS or len(set(lengths)) != len(lengths):
        raise InputError("--table-lengths", f"{len(lengths)} lengths, {len(set(lengths))} distinct",
                         f"2 to {MAX_TABLE_LENGTHS} distinct lengths")
    if len(temps) > MAX_TEMPS or not all(math.isfinite(t) for t in temps):
        raise InputError("--temps", f"{len(temps)} temperatures ({', '.join(f'{t:g}' for t in temps[:6])}"
                                    f"{', ...' if len(temps) > 6 else ''})", f"1 to {MAX_TEMPS} finite values")
    if lengths[0] < lmin * (1 - 1e-9):
        raise InputError("--table-lengths", f"{format_eng(lengths[0], 'm')} is below --lmin {format_eng(lmin, 'm')}")
    if lengths[-1] > 1e-4:
        raise InputError("--lmax", f"{format_eng(lengths[-1], 'm')}", "at most 100 um")
    if not temps or len(set(temps)) != len(temps) or temps[0] < -273.15 or temps[-1] > 300:
        raise InputError("--temps", f"{', '.join(f'{t:g}' for t in temps)} degC", "distinct values in [-273, 300] degC")
    if not 1e-8 <= w_narrow < w_ref <= 1e-3:
        raise InputError("--wnarrow/--wref", f"{format_eng(w_narrow, 'm')} / {format_eng(w_ref, 'm')}",
                         "10 nm <= wnarrow < wref <= 1 mm")
    if not 0.2 <= vdd <= 20:
        raise InputError("--vdd", f"{vdd:g} V", "[0.2, 20] V")
    return lengths, temps, w_ref, w_narrow


def write_table_tech(text: str, out: Path, models, options, vdd: float, err_stream) -> dict:
    """Tabulate the card and write OUT.npz and OUT (the TOML `text` of the EKV summary fit
    turned into a table technology). Returns the tables (polarity -> PolarityTable)."""
    lengths, temps, w_ref, w_narrow = options
    tables = tab.tabulate(models, lengths, vdd, temps, w_ref, w_narrow,
                          log=lambda s: print(s, file=err_stream, flush=True))
    npz = out.with_suffix(".npz")
    card = os.path.relpath(Path(models.path).resolve(), out.resolve().parent)
    meta = {"card": str(models.path), "nmos": models.nmos, "pmos": models.pmos}
    write_bytes(npz, tab.save_tables(npz, tables, meta))
    t = tables[next(iter(tables))]
    lines = []
    for line in text.splitlines():
        if line.startswith("model = "):
            line = ('model = "table"        # the card tabulated (see [table]); the [nmos] and [pmos] constants '
                    "below are\n                       # its EKV summary fit: Newton start values, mismatch, "
                    "capacitance and drawing rules")
        lines.append(line)
    lengths_um = ", ".join(f"{x * 1e6:.4g}" for x in t.lengths)
    lines += [
        "",
        "[table]",
        f"# ngspice DC sweeps of single devices at W = {format_eng(w_ref, 'm')} (and {format_eng(w_narrow, 'm')} at "
        f"VSB = 0 for the narrow-width correction),",
        f"# L = {lengths_um} um, {', '.join(f'{x:g}' for x in temps)} degC, every corner section, "
        f"VGS, VDS and VSB up to {t.span:g} V.",
        f"file = {json.dumps(npz.name)}",
        f"card = {json.dumps(card)}",
        f"nmos = {json.dumps(models.nmos)}",
        f"pmos = {json.dumps(models.pmos)}",
    ]
    write_text(out, "\n".join(lines) + "\n")
    return tables
