"""What a lead looks at next to a front: the hand-off table (`pick`), several runs on the same
axes (`compare`), the Monte Carlo confirmation, the evaluate JSON object, shared text tables.

Imports `optimise.search`, `optimise.files` and `models`; imported by report, sweep and the CLI.
"""
