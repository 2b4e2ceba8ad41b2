"""The circuit of a stage: topology records (devices, sources, resistors, node list) and the
nodal Kirchhoff system over them (fallback solve, adjoint sensitivities).

Imports `models.devices` and `models.numerics`; imported by `models.stages` and above.
"""
