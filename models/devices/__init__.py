"""Device physics: technology records, constants, one module per model kind (EKV, square
law) behind the common interface of `mos`, Pelgrom mismatch, and the sized `Device`.

Imports only numpy, scipy, the standard library and `models.numerics`; every other part of
`models` may import it.
"""
