"""The shared junction and channel helpers against general-purpose references."""

import numpy as np
from scipy.special import expit

from blocks._junction import softplus_sigmoid


def test_softplus_and_sigmoid_agree_with_the_reference_functions_to_the_last_bits():
    # source: softplus(z) = log(1 + e^z) (numpy's logaddexp(0, z)) and the logistic
    # sigmoid 1 / (1 + e^-z) (scipy.special.expit). The series used beyond |z| = 18
    # (blocks/_junction.py) must be as exact as the logarithm it replaces: within a few
    # ulps (measured 2 ulps at most, the same as the logarithm and division elsewhere).
    z = np.concatenate([np.linspace(-60.0, 60.0, 24001), [-18.0, 18.0, -18.000001, 18.000001]])
    got = np.array([softplus_sigmoid(v) for v in z])
    softplus = np.logaddexp(0.0, z)
    sigmoid = expit(z)
    assert np.max(np.abs(got[:, 0] - softplus) / softplus) < 1e-15
    assert np.max(np.abs(got[:, 1] - sigmoid) / sigmoid) < 1e-15
