"""Pure analytic models of stagefront: devices, mismatch, technology and output stages.

This package imports only numpy, scipy and the standard library. It never opens files,
reads the environment, prints or logs; `optimise` does all of that at the edges.
"""
