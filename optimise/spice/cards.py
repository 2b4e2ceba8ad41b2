"""What reaches a SPICE deck from outside: model names, text in comments, model cards.

A deck is line-oriented, so a name holding a line break becomes a new, live line; and a
model card can carry a ``.control`` block (ngspice's scripting, with ``shell``) that runs
when the card is loaded. Model names from the command line must be plain SPICE names,
free text goes into decks only through `comment_safe`, and a card (with the files it
includes) is scanned by `scan_card` before use: control blocks and shell commands are
refused unless the user says they trust the card (``--trust-card``).
"""
from __future__ import annotations

import re
from pathlib import Path

from ..files.errors import InputError
from ..files.inputs import MAX_CARD_BYTES, read_input_text

NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_.]{0,63}")
_BREAKS = re.compile(r"[\x00-\x1f\x7f\x85\u2028\u2029]+")
_DANGER = re.compile(r"^\s*(\.control\b|\.endc\b|\.exec\b|shell\b|\.shell\b)", re.IGNORECASE)
_INCLUDE = re.compile(r"^\s*\.(lib|include|inc)\s+(\"[^\"]+\"|'[^']+'|\S+)", re.IGNORECASE)
_PATH_UNSAFE = re.compile(r"[\x00-\x1f\x7f\x85\u2028\u2029\"']")


def check_model_name(option: str, name: str) -> str:
    """`name` when it is a plain SPICE model name; InputError naming `option` otherwise."""
    if not isinstance(name, str) or not NAME.fullmatch(name):
        raise InputError(option, f"{name!r} is not a plain model name",
                         "a letter or _ then letters, digits, _ or . (at most 64 characters)",
                         "give the name as the card's .model line spells it")
    return name


def check_names_apply(models_path, nmos: str, pmos: str) -> None:
    """--nmos/--pmos name the models of a --models card: given without one, where they would
    be ignored, they are an InputError (the defaults, nch and pch, pass)."""
    if not models_path and (nmos, pmos) != ("nch", "pch"):
        raise InputError("--nmos/--pmos", f"{nmos!r}/{pmos!r} given without --models", "with --models FILE only",
                         "without --models the level-1 cards made from the technology (models nch and pch), or "
                         "the card a table technology names, are used")


def comment_safe(text) -> str:
    """`text` on one line: every control character and line break becomes a space, so that
    it stays inside the comment (or title) it is written into."""
    return _BREAKS.sub(" ", str(text))


def check_card_path(where: str, path: Path) -> None:
    """Refuse a card path that cannot be quoted safely in ``.include "PATH"``."""
    if _PATH_UNSAFE.search(str(path)):
        raise InputError(where, f"the path {str(path)!r} holds a quote or a control character",
                         hint="rename or move the card to a plain path")


def scan_card(where: str, path: Path, text: str, trust: bool = False, depth: int = 0) -> None:
    """Refuse a card holding ``.control``/``.endc``/``.exec`` or ``shell`` lines, here or in
    a file it includes (followed when it exists, up to 8 levels), unless `trust`."""
    if trust:
        return
    for number, line in enumerate(text.splitlines(), 1):
        if _DANGER.match(line):
            raise InputError(f"{where} {path}", f"line {number} {line.strip()[:40]!r} is a simulator command "
                             "(a .control block or shell command runs when the card is loaded)",
                             "model cards with .model, .lib/.endl, .param, .subckt and comments",
                             "remove those lines, or pass --trust-card if you wrote the card or trust its author")
        m = _INCLUDE.match(line)
        if m and depth < 8:
            target = Path(m.group(2).strip("\"'"))
            target = target if target.is_absolute() else path.parent / target
            if target.exists():  # a FIFO or device here would stall ngspice: read_input refuses it
                try:
                    inner = read_input_text(target, f"{where} {path}: line {number} includes {target}",
                                            MAX_CARD_BYTES)
                except InputError as err:
                    if "not UTF-8" in err.what:
                        continue
                    raise
                scan_card(where, target, inner, trust, depth + 1)
