"""Pair losses on the margin z = s_other - s_preferred.

A pair is satisfied when z < 0 (the preferred node scores higher). Scores are
s = n * x, so a typical score is O(1) whatever the graph size and the loss
parameter keeps one meaning across graphs. Each loss is a small pure JAX
function ``loss(z, param) -> (Q,)``, elementwise, differentiable in z; the
registry :data:`LOSSES` maps a name to it with the meaning of its one
parameter (its value, or how fitrank chooses it, is the objective's business:
see :func:`fitrank.objective.calibrate`).

=============  ====================================  ===========
name           loss(z)                               parameter
=============  ====================================  ===========
sigmoid        1 / (1 + exp(-z / beta))              temperature
logistic       log(1 + exp(z / beta))                temperature
squared_hinge  max(0, z + margin)^2                  margin
=============  ====================================  ===========

The sigmoid is a smooth count of wrongly ordered pairs (bounded, robust to
mislabelled pairs, not convex); the logistic loss is its convex upper bound;
the squared hinge asks for a margin and is zero beyond it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import jax
import jax.numpy as jnp

from fitrank.jax_settings import apply_jax_settings

apply_jax_settings()


def sigmoid_loss(z, temperature):
    """Smoothed 0/1 loss 1 / (1 + exp(-z / temperature)), (Q,) -> (Q,).

    References:
      Yan, Dodier, Mozer, Wolniewicz, "Optimizing classifier performance via
      an approximation to the Wilcoxon-Mann-Whitney statistic", ICML 2003.
    """
    return jax.nn.sigmoid(z / temperature)


def _softplus_from(z, decay):
    """log(1 + exp(z)) = max(z, 0) + log1p(exp(-|z|)) given decay = exp(-|z|): no overflow,
    full precision for z << 0."""
    return jnp.maximum(z, 0.0) + jnp.log1p(decay)


@jax.custom_jvp
def _softplus(z):
    return _softplus_from(z, jnp.exp(-jnp.abs(z)))


@_softplus.defjvp
def _softplus_jvp(primals, tangents):
    # The slope is the logistic sigmoid, from the same exp(-|z|) as the value: one
    # transcendental pass instead of jax.nn.softplus's separate value and slope
    # (measured: a third less time for objective + gradient over 2,800 pairs).
    (z,), (dz,) = primals, tangents
    decay = jnp.exp(-jnp.abs(z))
    value = _softplus_from(z, decay)
    slope = jnp.where(z >= 0, 1.0, decay) / (1.0 + decay)
    return value, slope * dz


def logistic_loss(z, temperature):
    """log(1 + exp(z / temperature)), (Q,) -> (Q,), as a softplus so large z does not overflow.

    References:
      Burges et al., "Learning to rank using gradient descent", ICML 2005
      (the pairwise logistic / cross-entropy loss).
    """
    return _softplus(z / temperature)


def squared_hinge_loss(z, margin):
    """max(0, z + margin)^2, (Q,) -> (Q,).

    References:
      Chapelle & Keerthi, "Efficient algorithms for ranking with SVMs",
      Information Retrieval 13(3), 2010 (squared hinge on pair margins).
    """
    return jnp.square(jnp.maximum(0.0, z + margin))


@dataclass(frozen=True)
class Loss:
    """One registered pair loss.

    Attributes:
      name: registry key.
      fn: ``fn(z (Q,), param) -> (Q,)``, pure JAX.
      param_name: what its parameter means (``"temperature"`` or ``"margin"``).
      param_may_be_zero: a margin may be 0; a temperature may not.
    """

    name: str
    fn: Callable
    param_name: str
    param_may_be_zero: bool

    def check_param(self, value: float) -> float:
        """``value`` as a float; ValueError when it is out of range for this loss."""
        value = float(value)
        low_ok = value >= 0.0 if self.param_may_be_zero else value > 0.0
        if not (low_ok and value < float("inf")):
            bound = ">= 0" if self.param_may_be_zero else "> 0"
            raise ValueError(f"the {self.name} loss needs a finite {self.param_name} {bound}, got {value}")
        return value


LOSSES: dict[str, Loss] = {
    "sigmoid": Loss("sigmoid", sigmoid_loss, "temperature", False),
    "logistic": Loss("logistic", logistic_loss, "temperature", False),
    "squared_hinge": Loss("squared_hinge", squared_hinge_loss, "margin", True),
}


def get_loss(name: str) -> Loss:
    """The registered loss called ``name``; ValueError listing the choices otherwise."""
    if name not in LOSSES:
        raise ValueError(f"unknown loss '{name}'; choose one of {', '.join(LOSSES)}")
    return LOSSES[name]
