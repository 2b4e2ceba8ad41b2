"""Sweeps: grid files expanded into stand-alone studies, one Dask task per cell, and the combined
summary of the cells.

Imports `optimise.review`, `optimise.search`, `optimise.files` and `models`; imported by the CLI.
"""
