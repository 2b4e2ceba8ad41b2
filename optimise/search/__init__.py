"""The search and its run folders: the pymoo problem, NSGA-II with archive, checkpoints and
hypervolume, the `optimise` command, front.csv and run.json (written and read back), figures,
process settings for long runs.

Imports `optimise.files` and `models`; imported by review, report, spice, sweep and the CLI.
"""
