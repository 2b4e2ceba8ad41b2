"""Numerical solvers over batches: root finding (bracketed, Newton) and small linear systems
(dense with per-element singular handling, sparse elimination over a shared structure).

Mathematics only (numpy); the bottom floor of `models`, importable from anywhere.
"""
