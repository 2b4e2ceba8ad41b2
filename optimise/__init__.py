"""stagefront's edges: study files, search, export, plots, SPICE hand-off, command line."""

__version__ = "0.1.0"

# Shown by every command and in every file a person reads.
CAUTION = ("Model estimates for early design only: the foundry's process design kit and sign-off "
           "simulation decide. Never tape out from these numbers.")
