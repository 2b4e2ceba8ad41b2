"""Read a technology file (TOML) into `models.devices.tech.Tech`.

Format (every number SI, or a string with an engineering suffix such as "280u")::

    name = "demo180-invented"
    model = "ekv"            # or "square-law", or "table" (then a [table] section)
    tnom = 300.15            # K, optional (default models.devices.constants.T_NOMINAL)
    grid = "5n"              # m, drawing grid
    diffusion_extension = "0.5u"  # m, optional: source/drain length beyond the gate, for the
                             #   netlists' AD/AS/PD/PS (default 2.5 x l_min of each polarity)
    [nmos]                   # every MosTech field: vt0 kp n gamma phi va_per_l tc_vt
    ...                      #   mu_exp a_vt a_beta cox cov w_min l_min; optional junctions
                             #   cj (F/m^2) mj pb (V) cjsw (F/m) mjsw pbsw (V): none without
    [pmos]
    ...
    [corners.ff]             # optional; any of tt ff ss fs sf; tt defaults to no shift
    dvt_n = -0.05            # V added to the NMOS threshold magnitude
    kp_n = 1.1               # factor on the NMOS KP (likewise dvt_p, kp_p)
    [table]                  # model = "table" only: the card tabulated (calibrate --tables)
    file = "NAME.npz"        # the arrays, relative to this file
    card = "CARD.lib"        # optional: the card tabulated, for verify (and its model names
    nmos = "nch"             #   nmos, pmos); the [nmos]/[pmos] constants then summarise the
    pmos = "pch"             #   card (start values), mismatch and drawing rules hold as ever
    [calibration]            # optional; written by `stagefront calibrate`
    fitted_lengths_um = [0.36]   # lengths the analytic model was fitted at (um)

Every problem raises `InputError` naming the file, the key as a table path, the value and
what is allowed; nothing else escapes `load_tech`.
"""
from __future__ import annotations

import dataclasses
import zipfile
from pathlib import Path

import numpy as np

from models.devices.constants import T_NOMINAL
from models.devices.table_data import QUANTITIES, PolarityTable
from models.devices.tech import Corner, CornerShift, ModelKind, MosTech, Polarity, Tech

from .errors import InputError
from .tables import (
    build,
    check_keys,
    closest,
    micrometres,
    number,
    read_toml,
    show,
    sub_table,
)

# Unit of every numeric key; a unit word in a suffixed string must match it.
MOS_UNITS = {
    "vt0": "V", "kp": "A/V^2", "n": "", "gamma": "V^0.5", "phi": "V", "va_per_l": "V/m",
    "tc_vt": "V/K", "mu_exp": "", "a_vt": "V*m", "a_beta": "m", "cox": "F/m^2", "cov": "F/m",
    "w_min": "m", "l_min": "m", "cj": "F/m^2", "mj": "", "pb": "V", "cjsw": "F/m", "mjsw": "", "pbsw": "V",
}  # fmt: skip
CORNER_UNITS = {"dvt_n": "V", "kp_n": "", "dvt_p": "V", "kp_p": ""}
TOP_KEYS = ("name", "model", "tnom", "grid", "nmos", "pmos", "corners", "table", "calibration",
            "diffusion_extension")
TABLE_KEYS = ("file", "card", "nmos", "pmos")
TOP_REQUIRED = ("name", "model", "grid", "nmos", "pmos")
MOS_KEYS = tuple(f.name for f in dataclasses.fields(MosTech))
# The junction keys are optional (no junction capacitance without cj and cjsw).
JUNCTION_KEYS = ("cj", "mj", "pb", "cjsw", "mjsw", "pbsw")
MOS_REQUIRED = tuple(k for k in MOS_KEYS if k not in JUNCTION_KEYS)
MODELS = tuple(k.value for k in ModelKind)
CORNERS = tuple(c.value for c in Corner)


def _mos(where: str, table: str, data) -> MosTech:
    data = sub_table(where, "", table, data)
    check_keys(where, table, data, MOS_KEYS, MOS_REQUIRED)
    # va_per_l = inf is the documented way to switch length modulation off.
    values = {k: number(where, table, k, data[k], MOS_UNITS.get(k, ""), allow_inf=k == "va_per_l")
              for k in MOS_KEYS if k in data}
    return build(where, table, MosTech, values)


def _corners(where: str, data) -> dict[Corner, CornerShift]:
    data = sub_table(where, "", "corners", data)
    check_keys(where, "corners", data, CORNERS, hint="corners are tables such as [corners.ff]")
    shifts = {Corner.TT: CornerShift()}
    for name, table in data.items():
        path = f"corners.{name}"
        table = sub_table(where, "corners", name, table)
        check_keys(where, path, table, tuple(CORNER_UNITS))
        values = {k: number(where, path, k, v, CORNER_UNITS[k]) for k, v in table.items()}
        shifts[Corner(name)] = build(where, path, CornerShift, values)
    return shifts


def _table(where: str, data, base_dir):
    """The `[table]` section of a table technology: its arrays, and the card they came from."""
    data = sub_table(where, "", "table", data)
    check_keys(where, "table", data, TABLE_KEYS, ("file",))
    for key in TABLE_KEYS:
        if key in data and (not isinstance(data[key], str) or not data[key].strip()):
            raise InputError(where, f"table.{key} = {show(data[key])} is not a name", "a non-empty string")
    if base_dir is None:
        raise InputError(where, "a table technology read from text has no folder to find table.file in",
                         hint="read it from its file")
    file = Path(base_dir) / data["file"]
    tables = load_tables(file, f"{where}: table.file {data['file']!r} ({file})")
    card = None
    if "card" in data:
        card = (str(Path(base_dir) / data["card"]), data.get("nmos", "nch"), data.get("pmos", "pch"))
    return tables, card


def _fitted_lengths(where: str, data) -> tuple:
    """[calibration] fitted_lengths_um: the lengths an analytic model was fitted at [m]."""
    data = sub_table(where, "", "calibration", data)
    check_keys(where, "calibration", data, ("fitted_lengths_um",))
    values = data.get("fitted_lengths_um", [])
    if not isinstance(values, list) or not values:
        raise InputError(where, f"[calibration] fitted_lengths_um = {show(values)} is not a non-empty array",
                         "the lengths the model was fitted at, in um, e.g. [0.36, 0.72]")
    out = []
    for v in values:
        x = micrometres(where, "calibration", "fitted_lengths_um", v)
        if not 0.01e-6 <= x <= 1000e-6:
            raise InputError(where, f"[calibration] fitted_lengths_um: {show(v)} is not allowed",
                             "lengths from 0.01 to 1000 um")
        out.append(x)
    return tuple(sorted(out))


def tech_from_dict(data: dict, where: str = "<technology>", base_dir=None) -> Tech:
    """Check and convert the parsed contents of a technology file.

    Parameters
    ----------
    data : dict
        The table `tomllib` returns for a technology file.
    where : str
        Name used at the start of error messages (normally the file path).

    base_dir : path, optional
        Folder that relative paths of a table technology's `[table]` section start from.

    Returns
    -------
    Tech
        Frozen technology, SI throughout.

    Raises
    ------
    InputError
        Unknown, missing or mistyped keys, unreadable numbers, values out of range,
        unknown model kind or corner.
    """
    if not isinstance(data, dict):
        raise InputError(where, f"the technology is {show(data)}", "a table of key = value lines")
    check_keys(where, "", data, TOP_KEYS, TOP_REQUIRED)
    name = data["name"]
    if not isinstance(name, str) or not name.strip():
        raise InputError(where, f"name = {show(name)} is not a name", "a non-empty string, e.g. \"demo180-invented\"")
    model = data["model"]
    if not isinstance(model, str) or model not in MODELS:
        shown = show(model)
        raise InputError(where, f"model = {shown} is not a model kind", ", ".join(MODELS), closest(model, MODELS))
    kwargs = {
        "name": name,
        "model": ModelKind(model),
        "nmos": _mos(where, "nmos", data["nmos"]),
        "pmos": _mos(where, "pmos", data["pmos"]),
        "grid": number(where, "", "grid", data["grid"], "m"),
        "tnom": number(where, "", "tnom", data["tnom"], "K") if "tnom" in data else T_NOMINAL,
        "corners": _corners(where, data["corners"]) if "corners" in data else {Corner.TT: CornerShift()},
    }
    if kwargs["model"] is ModelKind.TABLE:
        if "table" not in data:
            raise InputError(where, "model = \"table\" without a [table] section",
                             hint="a table technology names its array file: [table] file = \"NAME.npz\"")
        kwargs["tables"], kwargs["card"] = _table(where, data["table"], base_dir)
    elif "table" in data:
        raise InputError(where, f"a [table] section with model = \"{model}\"", "[table] only with model = \"table\"")
    if "calibration" in data:
        kwargs["fitted_lengths"] = _fitted_lengths(where, data["calibration"])
    if "diffusion_extension" in data:
        kwargs["diffusion_extension"] = number(where, "", "diffusion_extension", data["diffusion_extension"], "m")
    return build(where, "", Tech, kwargs)


def load_tech(path) -> Tech:
    """Read a technology file.

    Parameters
    ----------
    path : str or os.PathLike
        TOML file, e.g. "studies/tech/demo180-invented.toml".

    Returns
    -------
    Tech
        Frozen technology, SI throughout.

    Raises
    ------
    InputError
        The file is missing, unreadable or not TOML, or its contents fail the checks of
        `tech_from_dict`. Every message starts with the path.
    """
    data = read_toml(path, hint="shipped technologies are in studies/tech/")
    return tech_from_dict(data, str(path), Path(path).parent)


def check_table_size(where: str, table: str, key: str, values, tech: Tech, polarity) -> None:
    """A table technology holds lengths and widths only where it was tabulated: raise
    InputError naming the key and the tabulated range when `values` [m] ("w" or "l") leave
    it (no-op for the analytic kinds)."""
    from models.devices.table_data import check_lengths, check_widths

    if tech.tables is None:
        return
    try:
        (check_lengths if key == "l" else check_widths)(tech.tables[polarity], values, key)
    except ValueError as err:
        raise InputError(where, f"[{table}] {err}", hint=f"the device tables of {tech.name}; tabulate more "
                                                         "lengths with stagefront calibrate --tables") from None


def check_table_temperatures(where: str, temps_k, tech: Tech) -> None:
    """InputError when a study temperature lies outside a table technology's temperatures."""
    from models.devices.table_data import check_temperatures

    if tech.tables is None:
        return
    for t in tech.tables.values():
        try:
            check_temperatures(t, temps_k)
        except ValueError as err:
            raise InputError(where, f"[conditions] temperatures_c: {err}",
                             hint="tabulate them with stagefront calibrate --tables --temps") from None


# ---------------------------------------------------------------------------------------
# The device tables of a table technology (the .npz its [table] section names): numpy
# arrays only, read with allow_pickle=False, so a file received from someone runs nothing.
# ---------------------------------------------------------------------------------------
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
