"""The one exception for problems in what the user gave us (files, options, values).

The command line catches `InputError`, prints it to stderr and exits with status 2; any
other exception is a fault in stagefront itself.
"""
from __future__ import annotations


class InputError(Exception):
    """A user input problem, worded where -> what -> allowed -> hint.

    Parameters
    ----------
    where : str
        The file (or option) at fault, e.g. "studies/tech/x.toml". A single argument is
        taken as the whole, already composed message.
    what : str
        What is wrong, naming the key as a table path and the value,
        e.g. "[nmos] kp = -1e-05 A/V^2 is outside the allowed range [1e-06, 0.01] A/V^2".
    allowed : str
        What would be accepted (choices, range, required keys); optional.
    hint : str
        How to fix it; optional.

    Examples
    --------
    >>> str(InputError("x.toml", "[corners] 'tf' is not a corner", "tt, ff, ss, fs, sf", "did you mean 'tt'?"))
    "x.toml: [corners] 'tf' is not a corner; allowed: tt, ff, ss, fs, sf; hint: did you mean 'tt'?"
    """

    def __init__(self, where: str, what: str = "", allowed: str = "", hint: str = "") -> None:
        self.where, self.what, self.allowed, self.hint = where, what, allowed, hint
        message = f"{where}: {what}" if what else where
        if allowed:
            message += f"; allowed: {allowed}"
        if hint:
            message += f"; hint: {hint}"
        super().__init__(message)
