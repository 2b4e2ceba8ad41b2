"""stagefront's edges, by user action, lowest floor first: `files` (reading what people hand
in), `search` (NSGA-II and run folders), `review` (pick, compare, Monte Carlo), `report`,
`spice` (the SPICE hand-off), `sweep` (Dask), and `cli.py` on top.

This module holds constants only and imports nothing, so every folder may import it.
"""

__version__ = "0.1.0"

# Shown by every command and in every file a person reads.
CAUTION = ("Model estimates for early design only: the foundry's process design kit and sign-off "
           "simulation decide. Never tape out from these numbers.")
