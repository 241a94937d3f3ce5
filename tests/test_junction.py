"""The shared junction and channel helpers against general-purpose references."""

import math

import numpy as np
from scipy.special import expit

from blocks._junction import SOFTPLUS_LIMIT, channel, softplus_sigmoid


def test_softplus_and_sigmoid_agree_with_the_reference_functions_to_the_last_bits():
    # source: softplus(z) = log(1 + e^z) (numpy's logaddexp(0, z)) and the logistic
    # sigmoid 1 / (1 + e^-z) (scipy.special.expit). Within |z| <= SOFTPLUS_LIMIT the
    # helper must be as exact as the logarithm and division it uses: a few ulps.
    z = np.concatenate([np.linspace(-SOFTPLUS_LIMIT, SOFTPLUS_LIMIT, 14401), [-1e-300, 1e-300]])
    got = np.array([softplus_sigmoid(v) for v in z])
    softplus = np.logaddexp(0.0, z)
    sigmoid = expit(z)
    assert np.max(np.abs(got[:, 0] - softplus) / softplus) < 1e-15
    assert np.max(np.abs(got[:, 1] - sigmoid) / sigmoid) < 1e-15


def test_softplus_and_sigmoid_beyond_the_limit_differ_from_the_reference_by_below_exp_minus_18():
    # source: as above; beyond |z| = 18, log(1 + e^z) - z = log(1 + e^-z) < e^-z and
    # 1 - expit(z) = expit(-z) < e^-z: the limits differ from the functions by less than
    # e^-18 = 1.5e-8 (absolute), i.e. below 1e-9 of a conducting channel's overdrive.
    z = np.concatenate([np.linspace(SOFTPLUS_LIMIT * (1 + 1e-12), 800.0, 4001),
                        -np.linspace(SOFTPLUS_LIMIT * (1 + 1e-12), 800.0, 4001)])
    got = np.array([softplus_sigmoid(v) for v in z])
    bound = math.exp(-SOFTPLUS_LIMIT)
    assert np.all(np.abs(got[:, 0] - np.logaddexp(0.0, z)) <= bound)
    assert np.all(np.abs(got[:, 1] - expit(z)) <= bound)
    assert np.all(np.abs(got[z > 0, 0] - z[z > 0]) == 0.0)
    assert np.all(got[z < 0] == 0.0)


def test_a_channel_switched_off_beyond_the_limit_carries_no_current_that_matters():
    # source: the square-law channel (blocks/_junction.py) with its smooth overdrive
    # evaluated exactly (numpy's logaddexp) just inside the limit, where the helper still
    # computes it: the current there, which the limit drops to zero one step further
    # off, is below 1e-20 A (common practice: leakage of a CMOS gate input is pA to nA).
    k, vt, clm, two_phi = 0.55e-3, 1.3, 0.05, 2 * 1.5 * 0.025852
    vgs = vt - SOFTPLUS_LIMIT * two_phi * (1 - 1e-9)  # just inside the limit
    exact = 0.5 * k * (two_phi * np.logaddexp(0.0, (vgs - vt) / two_phi)) ** 2
    amps = channel(vgs, 4.5, k, vt, clm, two_phi)[0]
    assert abs(exact) < 1e-20
    assert abs(amps) < 1e-20
    off = channel(vgs - 1e-3, 4.5, k, vt, clm, two_phi)
    assert off[0] == 0.0 and off[1] == 0.0
