"""stagefront's edges: study files, search, export, plots, SPICE hand-off, command line."""

__version__ = "0.1.0"
