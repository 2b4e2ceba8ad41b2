"""Read the device tables of a `table` technology (the `.npz` file its `[table]` section
names) into `models.devices.table_data.PolarityTable`s.

The file is numpy arrays only, read with `allow_pickle=False`, so opening one received from
someone else runs nothing. Every problem (missing file or array, wrong shape, values that
are not finite, a grid not as described) raises `InputError` naming the file and the array.
"""
from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from models.devices.table_data import QUANTITIES, PolarityTable
from models.devices.tech import Polarity

from .errors import InputError

FORMAT = 1
MAX_BYTES = 1 << 30  # a table file is a few tens of MB; anything near a gigabyte is not one
AXES = ("vgs", "vds", "vsb", "lengths", "temps", "w_ref", "w_narrow", "corners", "slots")


def _array(where: str, npz, key: str, dtype=float) -> np.ndarray:
    if key not in npz.files:
        raise InputError(where, f"array {key!r} is missing", hint="remake the file with stagefront calibrate --tables")
    try:
        a = npz[key]
    except (ValueError, OSError, zipfile.BadZipFile) as err:
        raise InputError(where, f"array {key!r} cannot be read ({err})") from None
    if dtype is str:
        if a.dtype.kind != "U":
            raise InputError(where, f"array {key!r} holds {a.dtype} values", "text (corner names)")
        return a
    if a.dtype.kind not in "fiu":
        raise InputError(where, f"array {key!r} holds {a.dtype} values", "numbers")
    return np.asarray(a, dtype=dtype)


def load_tables(path, where: str | None = None) -> dict[Polarity, PolarityTable]:
    """Both polarities' tables from a `.npz` file.

    Parameters
    ----------
    path : str or os.PathLike
        The array file.
    where : str, optional
        How the file is named in messages (default: its path).

    Raises
    ------
    InputError
        See the module notes.
    """
    path = Path(path)
    where = where or str(path)
    if not path.is_file():
        raise InputError(where, "device table file not found" if not path.exists() else "is not a regular file",
                         hint="make it with stagefront calibrate --tables, or fix [table] file")
    if path.stat().st_size > MAX_BYTES:
        raise InputError(where, f"is {path.stat().st_size / 2**20:.0f} MiB", f"at most {MAX_BYTES >> 20} MiB")
    try:
        npz = np.load(path, allow_pickle=False)
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as err:
        raise InputError(where, f"not a numpy array file ({err})", "an .npz written by stagefront calibrate --tables") \
            from None
    with npz:
        fmt = _array(where, npz, "format")
        if fmt.shape != () or int(fmt) != FORMAT:
            raise InputError(where, f"array 'format' = {fmt.tolist()!r}", f"{FORMAT} (this version's layout)")
        tables = {}
        for pol, tag in ((Polarity.N, "nmos"), (Polarity.P, "pmos")):
            axes = {k: _array(where, npz, f"{tag}_{k}", str if k == "corners" else float) for k in AXES}
            for k in ("vgs", "vds", "vsb", "lengths", "temps", "slots", "corners"):
                if axes[k].ndim != 1:
                    raise InputError(where, f"array '{tag}_{k}' has shape {axes[k].shape}", "one dimension")
                if k != "corners" and not np.all(np.isfinite(axes[k])):
                    raise InputError(where, f"array '{tag}_{k}' holds values that are not finite")
            if len(axes["corners"]) != len(axes["slots"]):
                raise InputError(where, f"arrays '{tag}_corners' and '{tag}_slots' differ in length")
            for k in ("w_ref", "w_narrow"):
                if axes[k].shape != () or not 1e-8 <= float(axes[k]) <= 1e-3:
                    raise InputError(where, f"array '{tag}_{k}' = {axes[k].tolist()!r} m", "one width in [10n, 1m] m")
            data = {q: _array(where, npz, f"{tag}_{q}", np.float32) for q in QUANTITIES + ("id_narrow",)}
            for q in QUANTITIES:
                if q.startswith("c"):  # stored per width in fF/um
                    data[q] = data[q] * np.float32(float(axes["w_ref"]) * 1e-9)
            slots = {str(c): int(s) for c, s in zip(axes["corners"], axes["slots"])}
            try:
                tables[pol] = PolarityTable(axes["vgs"], axes["vds"], axes["vsb"], axes["lengths"], axes["temps"],
                                            float(axes["w_ref"]), slots, data, float(axes["w_narrow"]))
            except ValueError as err:
                raise InputError(where, f"{tag}: {err}", hint="remake the file with stagefront calibrate --tables") \
                    from None
    return tables
