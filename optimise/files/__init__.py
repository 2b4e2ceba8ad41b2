"""Reading what people hand in: study, design, technology and search tables, engineering units,
checked TOML reads, the InputError wording, atomic file writes.

Imports `models` and the package constants only; every other folder of `optimise` may import it.
"""
