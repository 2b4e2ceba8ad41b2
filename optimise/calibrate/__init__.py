"""`stagefront calibrate`: a technology file from the user's SPICE model card. `calibrate`
(the command and the EKV or square-law fit), `devicefit` (the ngspice sweeps and fits of one
condition), `junctions` (the source and drain junctions measured by ngspice AC), `tables`
(the card tabulated for the `table` model kind) and `tabletech` (the table technology
written). Imports `optimise.files` and `optimise.spice`; only `cli` imports it.
"""
