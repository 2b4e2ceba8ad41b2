"""The output stage inside its amplifier: the amplifier's description (`spec`), the
small-signal nodal model of the stage at rest (`smallsignal`), poles, zeros and loop gain
(`response`), and slew and gate-drive time (`slew`).
Imports `models.circuit`, `models.devices` and `models.numerics`; imported by the top
modules of `models` (records, evaluate).
"""
