"""The HTML report and its Markdown twin: the numbers gathered once, figures, the verification
summary, rendering.

Imports `optimise.review` and the floors below it; imported by the CLI only.
"""
