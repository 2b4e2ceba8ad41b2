"""Read a technology file (TOML) into `models.devices.tech.Tech`.

Format (every number SI, or a string with an engineering suffix such as "280u")::

    name = "demo180-invented"
    model = "ekv"            # or "square-law"
    tnom = 300.15            # K, optional (default models.devices.constants.T_NOMINAL)
    grid = "5n"              # m, drawing grid
    diffusion_extension = "0.5u"  # m, optional: source/drain length beyond the gate, for the
                             #   netlists' AD/AS/PD/PS (default 2.5 x l_min of each polarity)
    [nmos]                   # every MosTech field: vt0 kp n gamma phi va_per_l tc_vt
    ...                      #   mu_exp a_vt a_beta cox cov w_min l_min
    [pmos]
    ...
    [corners.ff]             # optional; any of tt ff ss fs sf; tt defaults to no shift
    dvt_n = -0.05            # V added to the NMOS threshold magnitude
    kp_n = 1.1               # factor on the NMOS KP (likewise dvt_p, kp_p)

Every problem raises `InputError` naming the file, the key as a table path, the value and
what is allowed; nothing else escapes `load_tech`.
"""
from __future__ import annotations

import dataclasses

from models.devices.constants import T_NOMINAL
from models.devices.tech import Corner, CornerShift, ModelKind, MosTech, Tech

from .errors import InputError
from .tables import build, check_keys, closest, number, read_toml, show, sub_table

# Unit of every numeric key; a unit word in a suffixed string must match it.
MOS_UNITS = {
    "vt0": "V", "kp": "A/V^2", "n": "", "gamma": "V^0.5", "phi": "V", "va_per_l": "V/m",
    "tc_vt": "V/K", "mu_exp": "", "a_vt": "V*m", "a_beta": "m", "cox": "F/m^2", "cov": "F/m",
    "w_min": "m", "l_min": "m",
}  # fmt: skip
CORNER_UNITS = {"dvt_n": "V", "kp_n": "", "dvt_p": "V", "kp_p": ""}
TOP_KEYS = ("name", "model", "tnom", "grid", "nmos", "pmos", "corners", "diffusion_extension")
TOP_REQUIRED = ("name", "model", "grid", "nmos", "pmos")
MOS_KEYS = tuple(f.name for f in dataclasses.fields(MosTech))
MODELS = tuple(k.value for k in ModelKind)
CORNERS = tuple(c.value for c in Corner)


def _mos(where: str, table: str, data) -> MosTech:
    data = sub_table(where, "", table, data)
    check_keys(where, table, data, MOS_KEYS, MOS_KEYS)
    # va_per_l = inf is the documented way to switch length modulation off.
    values = {k: number(where, table, k, data[k], MOS_UNITS.get(k, ""), allow_inf=k == "va_per_l")
              for k in MOS_KEYS}
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


def tech_from_dict(data: dict, where: str = "<technology>") -> Tech:
    """Check and convert the parsed contents of a technology file.

    Parameters
    ----------
    data : dict
        The table `tomllib` returns for a technology file.
    where : str
        Name used at the start of error messages (normally the file path).

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
    return tech_from_dict(data, str(path))
