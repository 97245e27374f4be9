"""tripletkit.optimizers against the update rules as published.

- Adam: D. P. Kingma, J. Ba, "Adam: A Method for Stochastic Optimization", ICLR 2015, Algorithm 1
  (m_t = b1 m + (1 - b1) g, v_t = b2 v + (1 - b2) g^2, bias-corrected m_hat = m_t / (1 - b1^t),
  v_hat = v_t / (1 - b2^t), theta -= lr m_hat / (sqrt(v_hat) + eps), with b1 = 0.9, b2 = 0.999,
  eps = 1e-8), written out here step by step in plain Python floats.
- Classical momentum: I. Sutskever, J. Martens, G. Dahl, G. Hinton, "On the importance of
  initialization and momentum in deep learning", ICML 2013, eq. 1-2 (v = mu v - lr g; theta += v).
"""

import math

import numpy as np
import pytest

from tripletkit.optimizers import Adam, Momentum, make_optimizer


def _gradients(rng, steps):
    return [{"w": rng.normal(size=(2, 3)), "b": rng.normal(size=3)} for _ in range(steps)]


def test_adam_follows_algorithm_1(rng):
    start = {"w": rng.normal(size=(2, 3)), "b": rng.normal(size=3)}
    params = {k: v.copy() for k, v in start.items()}
    grads = _gradients(rng, 5)
    opt = Adam(params, ("w", "b"), lr=0.01)
    for g in grads:
        opt.step(params, g)
    for name in ("w", "b"):
        for idx in np.ndindex(start[name].shape):
            theta, m, v = float(start[name][idx]), 0.0, 0.0
            for t, g in enumerate(grads, 1):
                gt = float(g[name][idx])
                m = 0.9 * m + (1 - 0.9) * gt
                v = 0.999 * v + (1 - 0.999) * gt * gt
                theta -= 0.01 * (m / (1 - 0.9**t)) / (math.sqrt(v / (1 - 0.999**t)) + 1e-8)
            assert params[name][idx] == pytest.approx(theta, rel=1e-12, abs=1e-15)


def test_adam_first_step_is_the_step_size_times_the_sign():
    # Kingma & Ba, section 2.1: the first effective step is about lr in size, whatever |g| is.
    params = {"w": np.zeros(3)}
    Adam(params, ("w",), lr=0.5).step(params, {"w": np.array([1e-3, -7.0, 250.0])})
    np.testing.assert_allclose(params["w"], [-0.5, 0.5, -0.5], rtol=1e-4)


def test_momentum_follows_equations_1_and_2(rng):
    start = {"w": rng.normal(size=(2, 3)), "b": rng.normal(size=3)}
    params = {k: v.copy() for k, v in start.items()}
    grads = _gradients(rng, 5)
    opt = Momentum(params, ("w", "b"), lr=0.1, momentum=0.9)
    for g in grads:
        opt.step(params, g)
    for name in ("w", "b"):
        for idx in np.ndindex(start[name].shape):
            theta, velocity = float(start[name][idx]), 0.0
            for g in grads:
                velocity = 0.9 * velocity - 0.1 * float(g[name][idx])
                theta += velocity
            assert params[name][idx] == pytest.approx(theta, rel=1e-12, abs=1e-15)


def test_make_optimizer_by_name():
    params = {"w": np.zeros(2)}
    assert isinstance(make_optimizer("adam", params, ("w",), 0.1), Adam)
    sgd = make_optimizer("sgd", params, ("w",), 0.1, momentum=0.5)
    assert isinstance(sgd, Momentum) and sgd.mu == 0.5
