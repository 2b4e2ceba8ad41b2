"""The SPICE hand-off: the ngspice runner, netlists from a topology, test benches, and the
`netlist`, `verify` and `calibrate` commands with their device fits.

Imports `optimise.search`, `optimise.files` and `models`; imported by the CLI only.
"""
