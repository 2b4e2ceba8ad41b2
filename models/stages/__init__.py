"""Output-stage architectures: one module each, behind one registry."""
