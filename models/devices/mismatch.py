"""Random device mismatch after Pelgrom: area law for threshold and current factor.

Validity: the area law for devices of ordinary shape; the distance term and the
deviations of very narrow or very short devices (Drennan and McAndrew 2003) are left out.

Pelgrom's coefficients describe the difference between two identical devices,
sigma(dVT) = AVT / sqrt(W L). Each device therefore deviates from the mean by
AVT / sqrt(2 W L), and the difference of two independent draws has Pelgrom's sigma.

References
----------
M. J. M. Pelgrom, A. C. J. Duinmaijer, A. P. G. Welbers, "Matching properties of MOS
transistors", IEEE J. Solid-State Circuits 24(5):1433-1440, 1989.
"""
from __future__ import annotations

import numpy as np


def sigma_pair_vt(a_vt, w, l):
    """Std. deviation of the threshold difference of a matched pair [V].

    Parameters: a_vt [V*m]; w, l [m], float or arrays that broadcast.
    Returns AVT / sqrt(W L) in the broadcast shape.
    """
    return a_vt / np.sqrt(np.asarray(w) * np.asarray(l))


def sigma_pair_beta(a_beta, w, l):
    """Std. deviation of the relative current-factor difference of a pair [1].

    Parameters: a_beta [m]; w, l [m]. Returns Abeta / sqrt(W L), broadcast shape.
    """
    return a_beta / np.sqrt(np.asarray(w) * np.asarray(l))


def sigma_device_vt(a_vt, w, l):
    """Std. deviation of one device's threshold from the mean, AVT / sqrt(2 W L) [V]."""
    return sigma_pair_vt(a_vt, w, l) / np.sqrt(2.0)


def sigma_device_beta(a_beta, w, l):
    """Std. deviation of one device's relative current factor, Abeta / sqrt(2 W L) [1]."""
    return sigma_pair_beta(a_beta, w, l) / np.sqrt(2.0)


def sample(rng: np.random.Generator, a_vt, a_beta, w, l, size):
    """Draw independent per-device deviations for Monte Carlo.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness (passed in, so runs are reproducible).
    a_vt, a_beta : float
        Pelgrom coefficients [V*m] and [m].
    w, l : float or ndarray
        Device sizes [m]; shape s (scalar or e.g. (n_device,)).
    size : int
        Number of samples N.

    Returns
    -------
    dvt, dbeta : ndarray
        Threshold-magnitude deviation [V] and relative current-factor deviation [1],
        each of shape (N,) + s, independent normal draws.
    """
    shape = (size,) + np.shape(np.broadcast_arrays(np.asarray(w), np.asarray(l))[0])
    dvt = rng.standard_normal(shape) * sigma_device_vt(a_vt, w, l)
    dbeta = rng.standard_normal(shape) * sigma_device_beta(a_beta, w, l)
    return dvt, dbeta
