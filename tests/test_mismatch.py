"""Pelgrom area law of models.devices.mismatch: hand values and Monte Carlo.

[Pel89] M. J. M. Pelgrom, A. C. J. Duinmaijer, A. P. G. Welbers, "Matching properties of MOS
transistors", IEEE J. Solid-State Circuits 24(5):1433-1440, 1989.
"""
from __future__ import annotations

import numpy as np
import pytest

from models.devices import mismatch

UM = 1e-6
A_VT = 5e-3 * UM  # V*m, 5 mV*um
# m, 1 %*um: typical Abeta is 1-2 %*um ([Pel89]; P. R. Kinget, IEEE JSSC 40(6), 2005; from memory),
# a plausible value only.
A_BETA = 0.01 * UM
N_DRAWS = 200_000  # relative standard error of a sample sigma 1/sqrt(2 N) = 0.16 %
SEED = 20240611


@pytest.mark.parametrize(
    "a_vt, w, l, sigma",
    [
        # [Pel89] area law sigma = AVT / sqrt(W L), hand calc: 5 mV um / 1 um, / sqrt(10) um, 3.5 / 10 um
        (5e-3 * UM, 1 * UM, 1 * UM, 5.00e-3),
        (5e-3 * UM, 10 * UM, 1 * UM, 1.58e-3),
        (3.5e-3 * UM, 10 * UM, 10 * UM, 0.35e-3),
    ],
)
def test_sigma_pair_vt_hand_values(a_vt, w, l, sigma):
    # Quoted to 0.01 mV: half a unit of the last digit.
    assert mismatch.sigma_pair_vt(a_vt, w, l) == pytest.approx(sigma, abs=0.005e-3)


def test_sigma_pair_beta_follows_the_area_law():
    # [Pel89]: sigma(dbeta/beta) = Abeta / sqrt(W L); hand calc 1e-8 m / sqrt(1e-11 m^2) = 0.3162 %.
    assert mismatch.sigma_pair_beta(A_BETA, 10 * UM, 1 * UM) == pytest.approx(3.1623e-3, rel=1e-4)


@pytest.mark.parametrize("sigma", [mismatch.sigma_pair_vt, mismatch.sigma_pair_beta])
def test_sigma_halves_when_area_quadruples(sigma):
    # Area law: sqrt(4) = 2 in the denominator, exact up to rounding.
    assert sigma(A_VT, 8 * UM, 2 * UM) == pytest.approx(sigma(A_VT, 2 * UM, 2 * UM) / 2.0, rel=1e-12)


@pytest.mark.parametrize("device, pair, a", [(mismatch.sigma_device_vt, mismatch.sigma_pair_vt, A_VT),
                                             (mismatch.sigma_device_beta, mismatch.sigma_pair_beta, A_BETA)])
def test_one_device_deviates_by_the_pair_sigma_over_sqrt2(device, pair, a):
    # [Pel89] quotes the difference of a pair; the two devices deviate independently from the
    # mean, so var(pair) = 2 var(device): sigma_device = A / sqrt(2 W L), exact to rounding.
    # Hand calc for the threshold: 5 mV um / sqrt(2 * 10 um * 1 um) = 1.1180 mV.
    assert device(a, 10 * UM, 1 * UM) == pytest.approx(pair(a, 10 * UM, 1 * UM) / np.sqrt(2.0), rel=1e-14)
    if a == A_VT:
        assert device(a, 10 * UM, 1 * UM) == pytest.approx(1.1180e-3, rel=5e-5)


def _pair_difference(w, l, seed=SEED):
    """Deviations of two devices of the same size drawn independently, N_DRAWS times."""
    rng = np.random.default_rng(seed)
    dvt, dbeta = mismatch.sample(rng, A_VT, A_BETA, np.array([w, w]), np.array([l, l]), N_DRAWS)
    return dvt[:, 1] - dvt[:, 0], dbeta[:, 1] - dbeta[:, 0]


@pytest.mark.parametrize("w, l", [(1 * UM, 1 * UM), (10 * UM, 1 * UM), (20 * UM, 5 * UM)])
def test_sampled_vt_pair_difference_has_pelgrom_sigma(w, l):
    diff_vt, _ = _pair_difference(w, l)
    # Pelgrom's sigma describes the pair difference. With 200 000 draws the relative standard
    # error of a standard deviation is 1/sqrt(2 N) = 0.16 %: 4 of those.
    assert np.std(diff_vt) == pytest.approx(mismatch.sigma_pair_vt(A_VT, w, l), rel=4.0 / np.sqrt(2 * N_DRAWS))


@pytest.mark.parametrize("w, l", [(1 * UM, 1 * UM), (10 * UM, 1 * UM), (20 * UM, 5 * UM)])
def test_sampled_beta_pair_difference_has_pelgrom_sigma(w, l):
    _, diff_beta = _pair_difference(w, l)
    # Same 4-standard-error margin as for the threshold.
    assert np.std(diff_beta) == pytest.approx(mismatch.sigma_pair_beta(A_BETA, w, l), rel=4.0 / np.sqrt(2 * N_DRAWS))


def test_sampled_sigma_halves_when_area_quadruples():
    small, _ = _pair_difference(2 * UM, 2 * UM)
    large, _ = _pair_difference(8 * UM, 2 * UM, seed=SEED + 1)  # independent of `small`
    # Ratio of two independent estimates, each 0.16 % (1 sigma): 0.22 %; 4 of those.
    assert np.std(large) / np.std(small) == pytest.approx(0.5, rel=4.0 * np.sqrt(2.0 / (2 * N_DRAWS)))


def test_sample_is_reproducible_with_the_same_seed():
    a = mismatch.sample(np.random.default_rng(SEED), A_VT, A_BETA, 1 * UM, 1 * UM, 10)
    b = mismatch.sample(np.random.default_rng(SEED), A_VT, A_BETA, 1 * UM, 1 * UM, 10)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])


def test_sample_shape_is_draws_by_devices():
    w = np.full(6, 2 * UM)
    dvt, dbeta = mismatch.sample(np.random.default_rng(SEED), A_VT, A_BETA, w, 1 * UM, 100)
    assert dvt.shape == (100, 6) and dbeta.shape == (100, 6)
