"""Gradient steps for the projection head: Adam and SGD with classical momentum (numpy, in place).

Each optimiser keeps its state per parameter name and updates a dict of float64 arrays in place,
so the head's parameters are never copied. ``make_optimizer`` picks one by the name of the
``[head] optimizer`` option.

References
----------
.. [1] D. P. Kingma, J. Ba, "Adam: A Method for Stochastic Optimization", ICLR 2015 (Algorithm 1:
   beta1 = 0.9, beta2 = 0.999, eps = 1e-8, bias-corrected moments).
.. [2] I. Sutskever, J. Martens, G. Dahl, G. Hinton, "On the importance of initialization and
   momentum in deep learning", ICML 2013 (classical momentum, eq. 1-2).
"""

from __future__ import annotations

import numpy as np

__all__ = ["Adam", "Momentum", "make_optimizer"]

ADAM_BETA1, ADAM_BETA2, ADAM_EPS = 0.9, 0.999, 1e-8


class Adam:
    """Adam [1]_ with bias-corrected first and second moments.

    Parameters
    ----------
    params : dict of str -> ndarray
        The parameters (their shapes size the moments).
    names : sequence of str
        The names of the trained parameters.
    lr : float
        Step size.
    """

    def __init__(self, params, names, lr):
        self.lr, self.t = lr, 0
        self.m = {k: np.zeros_like(params[k]) for k in names}
        self.v = {k: np.zeros_like(params[k]) for k in names}

    def step(self, params, grads):
        """Update ``params[k]`` in place by one step along ``grads[k]``, for every ``k`` of ``grads``."""
        self.t += 1
        c1 = 1.0 - ADAM_BETA1 ** self.t
        c2 = 1.0 - ADAM_BETA2 ** self.t
        for k, g in grads.items():
            m, v = self.m[k], self.v[k]
            m *= ADAM_BETA1
            m += (1.0 - ADAM_BETA1) * g
            v *= ADAM_BETA2
            v += (1.0 - ADAM_BETA2) * (g * g)
            params[k] -= self.lr * (m / c1) / (np.sqrt(v / c2) + ADAM_EPS)


class Momentum:
    """SGD with classical momentum [2]_: v <- mu v - lr g; p <- p + v.

    Parameters
    ----------
    params : dict of str -> ndarray
    names : sequence of str
        The names of the trained parameters.
    lr : float
        Step size.
    momentum : float
        mu, the share of the previous velocity kept.
    """

    def __init__(self, params, names, lr, momentum):
        self.lr, self.mu = lr, momentum
        self.v = {k: np.zeros_like(params[k]) for k in names}

    def step(self, params, grads):
        """Update ``params[k]`` in place by one step along ``grads[k]``, for every ``k`` of ``grads``."""
        for k, g in grads.items():
            v = self.v[k]
            v *= self.mu
            v -= self.lr * g
            params[k] += v


def make_optimizer(name, params, names, lr, momentum=0.9):
    """The optimiser called ``name`` ("adam" or "sgd") for the parameters ``names`` of ``params``."""
    if name == "adam":
        return Adam(params, names, lr)
    return Momentum(params, names, lr, momentum)
