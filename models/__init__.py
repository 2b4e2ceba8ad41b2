"""Pure analytic models of stagefront, by concern, lowest floor first: `numerics` (batch
solvers), `devices` (technology, model kinds, mismatch), `circuit` (topologies, the nodal
system), `stages` (the architectures), then `summary` and `evaluate` on top.

This package imports only numpy, scipy and the standard library. It never opens files,
reads the environment, prints or logs; `optimise` does all of that at the edges.
"""
