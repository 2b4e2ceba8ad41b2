"""Output-stage architectures: one module each, behind one explicit registry.
Imports `models.circuit`, `models.devices` and `models.numerics`; imported by `models.evaluate`.

Every architecture module exposes the same names: NAME, ROLES, BIAS (bias name -> unit),
PULL_DOWN and PULL_UP (output roles to ground and to the supply), REPLICAS (pairs of roles
whose match the bias loop relies on: (replica, device it stands for)), TOPOLOGY, and the functions
bias_total, quiescent, driven, gates, gm_output, output and requirements.
"""
from . import fixed_bias, floating_loop, follower

STAGES = {m.NAME: m for m in (floating_loop, fixed_bias, follower)}


def get_stage(name: str):
    """The architecture module registered under `name`; unknown names list the known ones."""
    try:
        return STAGES[name]
    except KeyError:
        raise ValueError(f"unknown architecture {name!r}; known: {', '.join(sorted(STAGES))}") from None
