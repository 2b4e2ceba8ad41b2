"""Run ngspice in batch mode and read back its results as named numpy vectors.

One small runner for the whole project: stage cross-checks, netlist verification and
calibration all go through `run` (or `run_plots` when a deck mixes analyses).

How results come back
---------------------
ngspice writes a *rawfile*: a self-describing header (plot name, flags, the name and type
of every vector, the number of points) followed by the data, binary doubles or ASCII text.
The runner parses that file and never scrapes ngspice's console output, because the
console layout (page breaks, column widths, truncated names, interleaved notes) changes
with the analysis and the ngspice version, while the rawfile header names every vector
exactly. Both rawfile encodings are read; binary (ngspice's default) keeps every double
exactly, ASCII (``set filetype=ascii`` or ``SPICE_ASCIIRAWFILE=1``) is easier to eyeball.

Two kinds of deck are accepted (the first line is the title, as always in SPICE):

- **No ``.control`` block** (the usual case): ngspice is run as ``ngspice -b -n -r RAW``,
  runs every dot analysis (``.op``, ``.dc``, ``.tran``, ...) and writes all of them.
- **With a ``.control`` block** (e.g. ``alter`` then ``op`` for many designs in one
  process): the block itself must write its results to the file named by `RAWFILE`
  (relative; ngspice runs in a private temporary directory), with ``set appendwrite``
  before the first ``write`` when it writes more than once. ``-r`` is not passed then,
  because ngspice would run the dot analyses a second time after the block.

A run fails with `NgspiceError`, carrying ngspice's own error lines, when the process
cannot start, times out, exits non-zero (decks without ``.control``; with a control block
ngspice exits 1 merely because no dot analysis ran), prints an error (unparsable line,
missing model or include file, failed operating point, "timestep too small", unknown
command, missing vector), or leaves no rawfile with data. Warnings that ngspice recovers
from (gmin stepping past a singular matrix, say) do not fail the run.

The executable is ``shutil.which("ngspice")``; the environment variable STAGEFRONT_NGSPICE
(a path or a command name) overrides it. ``-n`` keeps a user's ``.spiceinit`` out of the run.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from models.devices.constants import T_NOMINAL, ZERO_CELSIUS
from models.devices.mos import at_conditions
from models.devices.tech import ModelKind, MosTech, Polarity

from . import process

ENV_EXECUTABLE = "STAGEFRONT_NGSPICE"
RAWFILE = "stagefront.raw"
DECKFILE = "deck.cir"

# Lines on ngspice's stderr that mean the run did not do what the deck asked. Gmin and
# source stepping print "failed" and "singular matrix" warnings on the way to a good
# solution, so those are not here; a run that really fails also prints "Error"/"aborted".
_ERROR_LINE = re.compile(
    r"\berror\b|aborted|no such command|is not available|not parsed|timestep too small",
    re.IGNORECASE,
)
_CONTROL = re.compile(r"^\s*\.control\b", re.IGNORECASE | re.MULTILINE)


class NgspiceError(Exception):
    """ngspice could not be run, or the run failed; the message quotes ngspice itself.

    Attributes: `returncode` (None if the process never finished), `stdout`, `stderr`,
    `timed_out` (the run reached its time limit).
    """

    def __init__(self, message: str, returncode: int | None = None, stdout: str = "", stderr: str = ""):
        super().__init__(message)
        self.returncode = returncode
        self.stdout = stdout
        self.stderr = stderr
        self.timed_out = False


@dataclass
class Plot:
    """One plot of a rawfile: an analysis result with its vectors.

    `name` is ngspice's plot name ("Operating Point", "DC transfer characteristic", ...);
    `vectors` maps lower-case vector names as ngspice writes them ("v(out)", "i(vdd)",
    "v(v-sweep)", "@m1[gm]") to arrays of shape (n_points,), float or complex.
    """

    title: str
    name: str
    flags: str
    vectors: dict[str, np.ndarray] = field(default_factory=dict)


# ---------------------------------------------------------------------------------------
# Executable
# ---------------------------------------------------------------------------------------
def find_executable() -> str | None:
    """Full path of the ngspice executable, or None.

    STAGEFRONT_NGSPICE (a path or a command name), when set and non-empty, is the only
    candidate; otherwise ``ngspice`` on PATH.
    """
    override = os.environ.get(ENV_EXECUTABLE, "").strip()
    return shutil.which(override) if override else shutil.which("ngspice")


def available() -> bool:
    """True when an ngspice executable is found (see `find_executable`)."""
    return find_executable() is not None


def require_executable() -> str:
    """`find_executable`'s path; NgspiceError, saying where it looked, when there is none."""
    exe = find_executable()
    if exe is None:
        override = os.environ.get(ENV_EXECUTABLE, "").strip()
        where = f"{ENV_EXECUTABLE}={override!r} is not an executable" if override else "ngspice is not on PATH"
        raise NgspiceError(f"ngspice not found: {where}; install it (Debian: apt-get install ngspice) or set {ENV_EXECUTABLE}")
    return exe


# ---------------------------------------------------------------------------------------
# Running
# ---------------------------------------------------------------------------------------
def run_plots(netlist: str, timeout: float = 60, progress=None) -> list[Plot]:
    """Run a deck in ngspice batch mode and return every plot it wrote, in file order.

    Parameters
    ----------
    netlist : str
        The complete deck; the first line is the title. See the module notes for decks
        with a ``.control`` block.
    timeout : float
        Wall-clock limit [s] for the ngspice process.
    progress : callable, optional
        Called with the seconds elapsed every 10 s while ngspice runs (`process.run`).

    Returns
    -------
    list of Plot

    Raises
    ------
    NgspiceError
        When ngspice is missing, cannot start, times out (``timed_out`` is then True) or
        reports a failure. The private folder of the run is removed on every exit path
        (`optimise.spice.process`).
    """
    exe = require_executable()
    has_control = _CONTROL.search(netlist) is not None
    with process.private_folder() as tmp:
        deck = Path(tmp) / DECKFILE
        deck.write_text(netlist if netlist.endswith("\n") else netlist + "\n")
        args = [exe, "-b", "-n"] + ([] if has_control else ["-r", RAWFILE]) + [DECKFILE]
        try:
            proc = process.run(args, tmp, timeout, progress)
        except subprocess.TimeoutExpired as err:
            failure = NgspiceError(f"ngspice did not finish within {timeout:.3g} s", None,
                                   _text(err.stdout), _text(err.stderr))
            failure.timed_out = True
            raise failure from None
        except OSError as err:
            raise NgspiceError(f"cannot start ngspice ({exe}): {err}") from err
        errors = [ln.strip() for ln in proc.stderr.splitlines()
                  if _ERROR_LINE.search(ln) and not ln.lstrip().lower().startswith("note")]
        raw = Path(tmp) / RAWFILE
        if errors or (proc.returncode != 0 and not has_control):
            raise _failure(proc, "ngspice reported errors", errors)
        if not raw.exists():
            hint = f"; a .control block must `write {RAWFILE}`" if has_control else ""
            raise _failure(proc, f"ngspice wrote no rawfile{hint}", errors)
        plots = parse_raw(raw.read_bytes())
    if not plots or any(len(v) == 0 for p in plots for v in p.vectors.values()):
        raise _failure(proc, "ngspice wrote no data (empty rawfile or a plot without points)", errors)
    return plots


def run(netlist: str, timeout: float = 60, progress=None) -> dict[str, np.ndarray]:
    """Run a deck in ngspice batch mode and return its vectors by name.

    Parameters
    ----------
    netlist : str
        The complete deck; the first line is the title. See the module notes.
    timeout : float
        Wall-clock limit [s] for the ngspice process.
    progress : callable, optional
        As for `run_plots`.

    Returns
    -------
    dict of str to ndarray
        Lower-case vector names as ngspice writes them ("v(out)", "i(vdd)") to arrays.
        A ``.op`` gives arrays of shape (1,); a sweep gives (n_points,). Several plots of
        the same kind with the same vectors (e.g. ``op`` after each ``alter``) are joined
        end to end, so n operating points give arrays of shape (n,).

    Raises
    ------
    NgspiceError
        As `run_plots`; also when the deck wrote plots of different kinds (say ``.op``
        and ``.dc``), whose vectors share names: use `run_plots` for such decks.
    """
    return join_plots(run_plots(netlist, timeout, progress))


def join_plots(plots: list[Plot]) -> dict[str, np.ndarray]:
    """Join plots of one kind end to end: {name: array of all their points}.

    Raises NgspiceError when the plots differ in kind or in their vector names.
    """
    if not plots:
        raise NgspiceError("no plots to join")
    first = plots[0]
    for p in plots[1:]:
        if p.name != first.name or list(p.vectors) != list(first.vectors):
            kinds = ", ".join(dict.fromkeys(q.name for q in plots))
            raise NgspiceError(f"the deck wrote plots of different kinds or vectors ({kinds}); use run_plots() for it")
    return {k: np.concatenate([p.vectors[k] for p in plots]) for k in first.vectors}


def vector(res: dict, name: str) -> np.ndarray:
    """A vector of `run`'s result (or a plot's vectors) by name, with or without the
    ``i(...)`` the rawfile wraps around a device's current (``i(@m.x1.m1[id])``).

    Raises KeyError(name) when it is not there.
    """
    for key in (name, f"i({name})"):
        if key in res:
            return res[key]
    raise KeyError(name)


def _text(x) -> str:
    if x is None:
        return ""
    return x.decode(errors="replace") if isinstance(x, bytes) else x


def _failure(proc: subprocess.CompletedProcess, what: str, errors: list[str]) -> NgspiceError:
    # All of stderr (warnings give the context of an error, e.g. the model not found), or
    # the matched lines if stderr is somehow empty of anything else.
    lines = list(dict.fromkeys([ln.strip() for ln in proc.stderr.splitlines() if ln.strip()] or errors))
    if len(lines) > 12:
        lines = lines[:2] + [f"... ({len(lines) - 10} more lines)"] + lines[-8:]
    detail = "\n".join(f"  {ln}" for ln in lines)
    msg = f"{what} (exit status {proc.returncode})" + (f":\n{detail}" if detail else "")
    return NgspiceError(msg, proc.returncode, proc.stdout, proc.stderr)


# ---------------------------------------------------------------------------------------
# Rawfile parsing
# ---------------------------------------------------------------------------------------
def parse_raw(data: bytes) -> list[Plot]:
    """Parse an ngspice rawfile (binary or ASCII, one or more plots).

    Parameters
    ----------
    data : bytes
        The whole file.

    Returns
    -------
    list of Plot
        In file order.
    """
    plots = []
    pos = 0
    while pos < len(data):
        # Skip blank lines between plots.
        while pos < len(data) and data[pos:pos + 1] in (b"\n", b"\r", b" ", b"\t"):
            pos += 1
        if pos >= len(data):
            break
        header = {}
        names: list[str] = []
        kinds: list[str] = []
        while True:
            end = data.find(b"\n", pos)
            if end < 0:
                raise ValueError("rawfile ends inside a header")
            line = data[pos:end].decode("ascii", errors="replace").rstrip("\r")
            pos = end + 1
            key, _, value = line.partition(":")
            key = key.strip().lower()
            if key == "variables":
                n_vars = int(header["no. variables"])
                for _ in range(n_vars):
                    end = data.find(b"\n", pos)
                    fields = data[pos:end].decode("ascii", errors="replace").split()
                    pos = end + 1
                    names.append(fields[1].lower())
                    kinds.append(fields[2].lower() if len(fields) > 2 else "")
            elif key in ("binary", "values"):
                break
            else:
                header[key] = value.strip()
        n_vars = len(names)
        n_points = int(header.get("no. points", "0"))
        is_complex = "complex" in header.get("flags", "").lower()
        if key == "binary":
            width = 2 if is_complex else 1
            count = n_points * n_vars * width
            block = np.frombuffer(data, dtype="<f8", count=count, offset=pos).reshape(n_points, n_vars * width)
            pos += 8 * count
            if is_complex:
                table = block[:, 0::2] + 1j * block[:, 1::2]
            else:
                table = block.copy()
        else:
            table, pos = _ascii_values(data, pos, n_points, n_vars, is_complex)
        plots.append(Plot(
            title=header.get("title", ""),
            name=header.get("plotname", ""),
            flags=header.get("flags", ""),
            vectors={name: _column(table, j, kind) for j, (name, kind) in enumerate(zip(names, kinds))},
        ))
    return plots


def _column(table: np.ndarray, j: int, kind: str) -> np.ndarray:
    """Column j; a frequency or time scale stays real (ngspice leaves its imaginary
    half uninitialised in complex plots)."""
    col = table[:, j]
    return col.real.copy() if kind in ("frequency", "time") and np.iscomplexobj(col) else col


def _ascii_values(data: bytes, pos: int, n_points: int, n_vars: int, is_complex: bool):
    """Read n_points records of (index, n_vars values) from an ASCII rawfile section."""
    table = np.empty((n_points, n_vars), dtype=complex if is_complex else float)
    tokens: list[str] = []
    needed = n_points * (n_vars + 1)
    while len(tokens) < needed:
        end = data.find(b"\n", pos)
        end = len(data) if end < 0 else end
        if pos >= len(data):
            raise ValueError("rawfile ends inside an ASCII data block")
        tokens.extend(data[pos:end].decode("ascii").split())
        pos = end + 1
    for k in range(n_points):
        row = tokens[k * (n_vars + 1) + 1:(k + 1) * (n_vars + 1)]
        if is_complex:
            table[k] = [complex(*map(float, t.split(","))) for t in row]
        else:
            table[k] = [float(t) for t in row]
    return table, pos


# ---------------------------------------------------------------------------------------
# Model cards
# ---------------------------------------------------------------------------------------
def level1_model_card(
    name: str,
    mos_tech: MosTech,
    polarity: Polarity | int,
    l: float,
    temp: float | None = None,
    tnom: float = T_NOMINAL,
    dvt: float = 0.0,
    kp_scale: float = 1.0,
) -> str:
    """A SPICE level-1 ``.model`` line with the constants of `models.devices.mos` (LD = 0).

    Parameters
    ----------
    name : str
        Model name used by the instance lines.
    mos_tech : MosTech
        Constants of one polarity at `tnom`.
    polarity : Polarity or int
        +1 NMOS, -1 PMOS (VTO is written negative for PMOS).
    l : float
        Drawn length of the devices that use this card [m]; level-1 LAMBDA is per volt,
        so a card holds for one length: LAMBDA = 1 / (va_per_l L), 0 when va_per_l is inf.
    temp : float or None
        None: the card holds the constants at `tnom` with TNOM = tnom, for a run at
        ``.temp`` = tnom. A temperature [K]: the card holds the constants that
        `models.devices.mos.at_conditions` gives at `temp` (VT0 - tc_vt (T - tnom),
        KP (T/tnom)^mu_exp) with TNOM = temp, so that ngspice, run at ``.temp`` = temp,
        applies none of its own temperature laws.
    tnom : float
        Temperature at which `mos_tech` holds [K]; 300.15 K (27 degC) by default.
    dvt, kp_scale : float
        Corner shift of the threshold magnitude [V] and factor on KP [1].

    Returns
    -------
    str
        One line, e.g. ``.model mn nmos (level=1 vto=0.7 kp=0.00011 gamma=0.4 phi=0.7
        lambda=0.04 tnom=27)``. Temperatures in the card are in degC, as SPICE expects.

    Notes
    -----
    Only the DC parameters are written. ngspice still adds its default bulk junctions
    (IS = 1e-14 A) with GMIN = 1e-12 S across them, a few pA at volts of reverse bias.
    """
    pol = int(polarity)
    if pol not in (1, -1):
        raise ValueError(f"polarity = {polarity!r} must be +1 (NMOS) or -1 (PMOS)")
    t = tnom if temp is None else float(temp)
    m = at_conditions(mos_tech, pol, ModelKind.SQUARE_LAW, t, tnom, dvt, kp_scale)
    va = mos_tech.va_per_l * l
    lam = 0.0 if np.isinf(va) else 1.0 / va
    kind = "nmos" if pol == 1 else "pmos"
    fields = {
        "level": "1",
        "vto": number(pol * float(m.vt0)),
        "kp": number(float(m.kp)),
        "gamma": number(mos_tech.gamma),
        "phi": number(mos_tech.phi),
        "lambda": number(lam),
        "tnom": number(round(t - ZERO_CELSIUS, 9)),  # 300.15 K - 273.15 is not exactly 27.0
    }
    return f".model {name} {kind} (" + " ".join(f"{k}={v}" for k, v in fields.items()) + ")"


def number(x: float) -> str:
    """Shortest text that reads back as the same double (no SPICE suffixes), for decks."""
    return repr(float(x))
