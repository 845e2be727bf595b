"""The training objective: weighted mean pair loss plus an L2 pull towards theta0.

    J(theta) = sum_q w_q loss(s_other(q) - s_preferred(q)) / sum_q w_q + lambda ||theta - theta0||^2,
    s = n * x(theta)

The pair term is written once, :func:`margin_term`, as a JAX function of the
pair margins; :func:`pair_term` feeds it margins gathered from the PageRank
values at the nodes the pairs touch. Three callers share it:

* :func:`reduced_objective`: the margins come straight from a reduced model's
  :class:`Scorer` (its ``differences``); J and its exact gradient are one
  jit-compiled JAX function of theta whose cost never depends on n;
* :func:`x_space_loss`: the pair term and its gradient with respect to a full
  (n,) vector x, for the full-space trainer (which turns dJ/dx into dJ/dtheta
  with the adjoint solve of :func:`fitrank.pagerank.adjoint_gradient`);
* :func:`full_objective`: that full-space route (full solve, pair term,
  adjoint solve) as a function of theta with the same call signature, so one
  optimisation loop drives both spaces.

Every objective has the same shape: ``value_and_grad(theta, arrays) ->
(scalar, (p,))`` with its ``arrays``; in the reduced space it is one jitted
JAX function and the arrays are passed as arguments, never closed over, so XLA
does not fold a model's large arrays into the compiled program.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np

from fitrank.errors import FitrankInputError
from fitrank.graph import Graph, Pairs
from fitrank.losses import Loss, get_loss
from fitrank.metrics import pair_accuracy
from fitrank.pagerank import WalkOperator, adjoint_gradient, solve_operator, walk_operator
from fitrank.weightings import Weighting


@dataclass(frozen=True)
class ObjectiveSpec:
    """What to minimise, independent of where x comes from.

    Attributes:
      loss: a name in :data:`fitrank.losses.LOSSES` (``"logistic"`` by default).
      loss_param: temperature (sigmoid, logistic) or margin (squared hinge);
        None = calibrated from the data by :func:`calibrate` when an objective
        is built (a tenth of the median |s_other - s_preferred| of the pairs at theta0).
      regularization: lambda >= 0 of the penalty lambda ||theta - theta0||^2.
    """

    loss: str = "logistic"
    loss_param: float | None = None
    regularization: float = 0.0

    def resolve(self) -> tuple[Loss, float | None]:
        """(the loss, its parameter or None); FitrankInputError naming the problem when invalid."""
        try:
            loss = get_loss(self.loss)
            param = None if self.loss_param is None else loss.check_param(self.loss_param)
        except ValueError as err:
            raise FitrankInputError(str(err)) from None
        if not (0.0 <= self.regularization < float("inf")):
            raise FitrankInputError(f"regularization must be a finite number >= 0, got {self.regularization}")
        return loss, param


AUTO_FRACTION = 0.1
"""An unset loss parameter becomes this fraction of the median pair score gap at theta0."""


def calibrate(spec: ObjectiveSpec, x: np.ndarray, pairs: Pairs, *, n: int) -> ObjectiveSpec:
    """``spec`` with an unset loss parameter fixed from the data's score gaps.

    The value is :data:`AUTO_FRACTION` times the median over ``pairs`` of
    |s_other - s_preferred|, s = n x. A good temperature (or margin) depends on
    how far apart the pairs' scores are, which no fixed number can know: pairs
    of near rank on a large graph may differ by 0.01 in s, on a small one by 1.
    Relative to that scale, a small value makes the sigmoid and logistic losses
    close to the count of misordered pairs (their sharp limit) while the nearest
    pairs still give a gradient. The fraction 0.1 was chosen by experiment on
    two differently built synthetic problems (a power-law generator and small
    grouped random graphs, 3 weightings each): at 1x the median the fitted
    parameters were biased and held-out accuracy 1-3 points lower; at 0.1x the
    parameters came within about 0.1 of the truth.

    Args:
      spec: the spec; returned unchanged when its ``loss_param`` is set.
      x: PageRank values indexed by the node indices of ``pairs`` (an (n,)
        vector, or values at localised positions).
      pairs: the pairs (normally the training split).
      n: number of graph nodes.

    Returns:
      A spec whose ``loss_param`` is a positive number.
    """
    if spec.loss_param is not None:
        return spec
    _require_pairs(pairs)
    x = np.asarray(x, dtype=np.float64)
    gaps = n * np.abs(x[pairs.other] - x[pairs.preferred])
    gaps = gaps[gaps > 0]
    if gaps.size == 0:
        name = get_loss(spec.loss).param_name
        raise FitrankInputError(f"cannot choose the {name} automatically: every training pair is tied at theta0; "
                                f"set training.{name} in the config")
    return ObjectiveSpec(spec.loss, AUTO_FRACTION * float(np.median(gaps)), spec.regularization)


@dataclass(frozen=True, eq=False)
class Objective:
    """J(theta) ready for an optimiser.

    Attributes:
      value: ``value(theta (p,), arrays) -> ()``, pure JAX and differentiable;
        None when J is not a JAX function (the full-space objective).
      value_and_grad: ``(theta, arrays) -> ((), (p,))``: jit-compiled JAX for
        the reduced objective, a host function for the full-space one.
      arrays: the pytree to pass as ``arrays``; ``arrays["weight"]`` holds the
        (Q,) pair weights normalised to sum 1 (see :func:`batch_arrays`).
      theta0: (p,) the regularisation target.
      spec: the loss and regularisation it was built with.
    """

    value: Callable
    value_and_grad: Callable
    arrays: dict
    theta0: np.ndarray
    spec: ObjectiveSpec

    @property
    def num_pairs(self) -> int:
        return int(self.arrays["weight"].shape[0])

    def __call__(self, theta) -> tuple[float, np.ndarray]:
        """(J, dJ/dtheta (p,)) at ``theta`` as NumPy values, with this objective's own arrays."""
        value, grad = jax.device_get(self.value_and_grad(np.asarray(theta, dtype=np.float64), self.arrays))
        return float(value), np.asarray(grad)


# --------------------------------------------------------------------------- the shared math


def localize(pairs: Pairs, nodes: np.ndarray) -> Pairs:
    """The same pairs with node indices replaced by positions in ``nodes``.

    Args:
      pairs: Q pairs over graph node indices.
      nodes: (S,) distinct node indices (any order) covering every node of ``pairs``.

    Returns:
      Pairs whose ``preferred``/``other`` index an (S,) vector of values at ``nodes``.
    """
    nodes = np.asarray(nodes, dtype=np.int64)
    order = np.argsort(nodes, kind="stable")
    ranked = nodes[order]
    positions = []
    for side in (pairs.preferred, pairs.other):
        at = np.minimum(np.searchsorted(ranked, side), ranked.size - 1)
        found = ranked[at] == side if ranked.size else np.zeros(side.shape, dtype=bool)
        if not np.all(found):
            missing = int(side[np.argmin(found)])
            raise ValueError(f"pair node {missing} is not among the {nodes.size} nodes the scorer returns")
        positions.append(order[at].astype(np.int64))
    return Pairs(positions[0], positions[1], pairs.weight, pairs.split)


def _require_pairs(pairs: Pairs) -> None:
    if len(pairs) == 0:
        raise FitrankInputError("the objective needs at least one training pair; this split has none")


def _margin_arrays(pairs: Pairs, spec: ObjectiveSpec) -> dict:
    """Arrays of :func:`margin_term`: normalised pair weights and the loss parameter."""
    _require_pairs(pairs)
    _, param = spec.resolve()
    if param is None:
        raise ValueError("the loss parameter is unset (\"auto\"): pass the spec an objective was built with "
                         "(Objective.spec, or TrainResult.extras['loss_param']) or call calibrate() first")
    weight = np.asarray(pairs.weight, dtype=np.float64)
    return {"weight": jnp.asarray(weight / weight.sum()), "loss_param": jnp.asarray(param)}


def _pair_arrays(pairs: Pairs, nodes: np.ndarray, spec: ObjectiveSpec, n: int) -> dict:
    """Arrays of :func:`pair_term`: those of the margins plus positions into ``nodes`` and n."""
    arrays = _margin_arrays(pairs, spec)
    local = localize(pairs, nodes)
    return {**arrays, "preferred": jnp.asarray(local.preferred), "other": jnp.asarray(local.other),
            "scale": jnp.asarray(float(n))}


def pair_term(x_nodes, arrays: dict, loss_name: str):
    """Weighted mean pair loss from the PageRank values at the pairs' nodes.

    Args:
      x_nodes: (S,) x at the nodes the pairs were localised to.
      arrays: from :func:`_pair_arrays` (weights already sum to 1).
      loss_name: registry name of the loss.

    Returns:
      () sum_q w_q loss(n x_other - n x_preferred).
    """
    margins = arrays["scale"] * (x_nodes[arrays["other"]] - x_nodes[arrays["preferred"]])
    return margin_term(margins, arrays, loss_name)


def margin_term(margins, arrays: dict, loss_name: str):
    """Weighted mean pair loss from the margins themselves.

    Args:
      margins: (Q,) z_q = s_other - s_preferred, scores s = n x.
      arrays: holding ``weight`` (Q,) summing to 1 and ``loss_param``.
      loss_name: registry name of the loss.

    Returns:
      () sum_q w_q loss(z_q).

    References:
      Burges et al., "Learning to rank using gradient descent", ICML 2005
      (a loss of the score difference of each preference pair, averaged).
    """
    return jnp.sum(arrays["weight"] * get_loss(loss_name).fn(margins, arrays["loss_param"]))


def penalty(theta, arrays: dict):
    """() lambda ||theta - theta0||^2, reading ``regularization`` and ``theta0`` from ``arrays``."""
    return arrays["regularization"] * jnp.sum(jnp.square(theta - arrays["theta0"]))


def _penalty_arrays(spec: ObjectiveSpec, theta0) -> dict:
    return {
        "regularization": jnp.asarray(float(spec.regularization)),
        "theta0": jnp.asarray(np.asarray(theta0, dtype=np.float64)),
    }


_pair_term_value_and_grad = jax.jit(jax.value_and_grad(pair_term), static_argnames=("loss_name",))
# Scoring a split needs no gradient; compiling one per split shape is several times cheaper without it.
_pair_term_value = jax.jit(pair_term, static_argnames=("loss_name",))
_penalty_value_and_grad = jax.jit(jax.value_and_grad(penalty))


def batch_arrays(objective: Objective, rng: np.random.Generator, size: int) -> dict:
    """The objective's arrays with the pair term restricted to ``size`` random pairs.

    The chosen pairs keep their relative weights (renormalised to sum 1), the
    others get weight 0; shapes do not change, so nothing recompiles.

    Args:
      objective: the full-batch objective.
      rng: source of the sample (seeded by the caller for reproducibility).
      size: pairs per batch; >= the number of pairs means all of them.

    Returns:
      A new arrays pytree for ``objective.value_and_grad``.
    """
    if size <= 0 or size >= objective.num_pairs:
        return objective.arrays
    full = np.asarray(objective.arrays["weight"])
    chosen = rng.choice(full.size, size=size, replace=False)
    weight = np.zeros_like(full)
    weight[chosen] = full[chosen]
    return {**objective.arrays, "weight": jnp.asarray(weight / weight.sum())}


# --------------------------------------------------------------------------- reduced space


def reduced_objective(scorer, pairs: Pairs, spec: ObjectiveSpec, *, n: int, theta0) -> Objective:
    """J(theta) on a reduced model's scorer: exact derivative of the reduced model.

    Args:
      scorer: a ``fitrank.reduced.Scorer`` (``fn(theta, arrays) -> (S,)``, ``arrays``,
        ``nodes`` (S,), ``differences``) whose nodes cover every node of ``pairs``.
      pairs: the pairs of one split (usually ``dataset.pairs.subset("train")``).
      spec: loss and regularisation.
      n: number of graph nodes (scores are n * x).
      theta0: (p,) regularisation target; an unset loss parameter is
        calibrated from the scores at theta0 (see :func:`calibrate`).

    Returns:
      The :class:`Objective`; its arrays hold the arrays of the scorer's pair
      margins under ``"model"``, its ``spec`` the loss parameter actually used.
    """
    loss, param = spec.resolve()
    local = localize(pairs, scorer.nodes)
    if param is None:
        at_theta0 = _scores(jnp.asarray(theta0, dtype=jnp.float64), scorer.arrays, score_fn=scorer.fn)
        spec = calibrate(spec, np.asarray(at_theta0), local, n=n)
    # The margins n (x_other - x_preferred) straight from the model: a reduced scorer folds
    # the differences into its readout rows, so no gather or scatter runs per step.
    margins = scorer.differences(local.other, local.preferred, scale=float(n))
    arrays = jax.device_put({"model": margins.arrays, **_margin_arrays(pairs, spec),
                             **_penalty_arrays(spec, theta0)})  # copied in once, not at every step
    static = {"score_fn": margins.fn, "loss_name": loss.name}
    return Objective(functools.partial(_reduced_value, **static),
                     _reduced_value_and_grad(**static),
                     arrays, np.asarray(theta0, dtype=np.float64), spec)


def _reduced_value(theta, arrays, score_fn, loss_name):
    return margin_term(score_fn(theta, arrays["model"]), arrays, loss_name) + penalty(theta, arrays)


@functools.lru_cache(maxsize=32)
def _reduced_value_and_grad(score_fn, loss_name):
    """One jitted value-and-gradient per (score function, loss): objectives rebuilt on the same
    scorer function reuse its compiled program, and calls pass only arrays (jit's fast path;
    static keyword arguments at every call cost about 20 us, a tenth of a Galerkin step)."""
    return jax.jit(jax.value_and_grad(functools.partial(_reduced_value, score_fn=score_fn, loss_name=loss_name)))


_scores = jax.jit(lambda theta, arrays, score_fn: score_fn(theta, arrays), static_argnames=("score_fn",))


def reduced_accuracy(scorer, pairs: Pairs) -> Callable[[np.ndarray], float]:
    """``theta -> weighted pair accuracy`` of the reduced scores (for validation).

    Args:
      scorer: a reduced model's scorer covering every node of ``pairs``.
      pairs: the pairs to score (e.g. the validation split).

    Returns:
      A function of a (p,) theta; NaN when ``pairs`` is empty.
    """
    local = localize(pairs, scorer.nodes)

    def accuracy(theta) -> float:
        values = _scores(jnp.asarray(theta, dtype=jnp.float64), scorer.arrays, score_fn=scorer.fn)
        return pair_accuracy(np.asarray(values), local)

    return accuracy


# --------------------------------------------------------------------------- full space


@dataclass(frozen=True, eq=False)
class XSpaceLoss:
    """The pair term as a function of a full PageRank vector.

    Attributes:
      nodes: (S,) the nodes the pairs touch.
      arrays: pair-term arrays over positions in ``nodes``.
      loss_name: registry name of the loss.
      n: number of graph nodes.
    """

    nodes: np.ndarray
    arrays: dict
    loss_name: str
    n: int

    def value_and_grad(self, x: np.ndarray, weight=None) -> tuple[float, np.ndarray]:
        """(pair term, d(pair term)/dx (n,)) at a full vector x (n,).

        Args:
          x: (n,) PageRank vector.
          weight: optional (Q,) pair weights summing to 1 replacing the stored ones (mini-batches).
        """
        arrays = self.arrays if weight is None else {**self.arrays, "weight": jnp.asarray(weight)}
        x_nodes = jnp.asarray(np.asarray(x, dtype=np.float64)[self.nodes])
        value, grad_nodes = _pair_term_value_and_grad(x_nodes, arrays, loss_name=self.loss_name)
        grad = np.zeros(self.n)
        grad[self.nodes] = np.asarray(grad_nodes)
        return float(value), grad

    def value(self, x: np.ndarray) -> float:
        """The pair term alone at a full vector x (n,)."""
        x_nodes = jnp.asarray(np.asarray(x, dtype=np.float64)[self.nodes])
        return float(_pair_term_value(x_nodes, self.arrays, loss_name=self.loss_name))


def x_space_loss(pairs: Pairs, spec: ObjectiveSpec, *, n: int) -> XSpaceLoss:
    """The pair term of ``pairs`` as a function of a full (n,) vector x; see :class:`XSpaceLoss`.

    ``spec`` must have its loss parameter set (an objective's ``spec``, or :func:`calibrate`).
    """
    loss, _ = spec.resolve()
    nodes = pairs.nodes()
    return XSpaceLoss(nodes, _pair_arrays(pairs, nodes, spec, n), loss.name, int(n))


def pair_summary(x: np.ndarray, pairs: Pairs, spec: ObjectiveSpec, *, resolution: float = 0.0) -> dict:
    """Pair count, weighted mean loss (no penalty) and accuracy of a full vector x (n,) on ``pairs``.

    ``spec`` must have its loss parameter set (pass the training objective's ``spec``
    so every split is scored with the same loss). ``resolution``: score
    differences up to it count as ties in the accuracy
    (:func:`~fitrank.metrics.pair_accuracy`).

    Returns:
      ``{"pairs": Q, "loss": float, "accuracy": float}``; loss and accuracy are NaN when Q = 0.
    """
    x = np.asarray(x, dtype=np.float64)
    if len(pairs) == 0:
        return {"pairs": 0, "loss": float("nan"), "accuracy": float("nan")}
    return {"pairs": len(pairs), "loss": x_space_loss(pairs, spec, n=x.size).value(x),
            "accuracy": pair_accuracy(x, pairs, resolution=resolution)}


class FullSolves:
    """Full PageRank solves at the parameter points an optimiser visits.

    Each solve starts from the previous solution (nearby thetas have nearby x,
    so a warm start saves iterations), and the last few results are kept so the
    same theta is never solved twice (a line search's accepted point is then
    scored for validation for free). Mutable by design: it is a cache.

    Attributes:
      count: full solves performed so far.
      iterations: mat-vecs spent by them.
    """

    def __init__(self, graph: Graph, weighting: Weighting, *, damping: float = 0.85, teleport=None,
                 dangling: str = "teleport", tol: float = 1e-10, keep: int = 8):
        self.graph, self.weighting = graph, weighting
        self.options = {"damping": damping, "teleport": teleport, "dangling": dangling}
        self.tol, self.keep = tol, keep
        self._recent: list[tuple[np.ndarray, np.ndarray, WalkOperator]] = []
        self.count = self.iterations = 0

    def solve(self, theta) -> tuple[np.ndarray, WalkOperator]:
        """(x (n,), the operator at theta) for a (p,) theta."""
        theta = np.asarray(theta, dtype=np.float64)
        for known, x, op in self._recent:
            if np.array_equal(known, theta):
                return x, op
        op = walk_operator(self.graph, self.weighting, theta, **self.options)
        start = self._recent[-1][1] if self._recent else None
        result = solve_operator(op, tol=self.tol, x0=start)
        self.count += 1
        self.iterations += result.report.iterations
        self._recent = (self._recent + [(theta.copy(), result.x, op)])[-self.keep:]
        return result.x, op


def full_objective(graph: Graph, weighting: Weighting, pairs: Pairs, spec: ObjectiveSpec, *, theta0,
                   damping: float = 0.85, teleport=None, dangling: str = "teleport", tol: float = 1e-10,
                   solves: FullSolves | None = None) -> tuple[Objective, FullSolves]:
    """J(theta) through full solves: the reference that reduced training is compared against.

    The value at theta costs one full solve, the gradient one more (transposed)
    solve by the adjoint method; both run in NumPy/SciPy, so the objective's
    ``value`` is None and ``value_and_grad`` is a plain host function with the
    same signature as the reduced one.

    Args:
      graph, weighting: the problem.
      pairs: the pairs of one split.
      spec: loss and regularisation (the same as the reduced objective's).
      theta0: (p,) regularisation target; an unset loss parameter is
        calibrated from the full solution at theta0.
      damping, teleport, dangling: the PageRank model (see :func:`fitrank.pagerank.pagerank`).
      tol: certified L1 tolerance of each full solve.
      solves: a solve cache to share (e.g. with a validation scorer); a new one by default.

    Returns:
      (the objective, the solve cache it uses).

    References:
      Giles & Pierce, "An introduction to the adjoint approach to design",
      Flow, Turbulence and Combustion 65, 2000 (adjoint gradient).
    """
    solves = solves or FullSolves(graph, weighting, damping=damping, teleport=teleport, dangling=dangling, tol=tol)
    if spec.resolve()[1] is None:
        spec = calibrate(spec, solves.solve(theta0)[0], pairs, n=graph.n)
    data = x_space_loss(pairs, spec, n=graph.n)

    def value_and_grad(theta, arrays):
        theta = np.asarray(theta, dtype=np.float64)
        x, op = solves.solve(theta)
        value, dfdx = data.value_and_grad(x, arrays["weight"])
        grad, _ = adjoint_gradient(graph, weighting, theta, x, dfdx, op=op)
        reg, reg_grad = _penalty_value_and_grad(jnp.asarray(theta), arrays)
        return value + float(reg), grad + np.asarray(reg_grad)

    arrays = {"weight": data.arrays["weight"], **_penalty_arrays(spec, theta0)}
    return Objective(None, value_and_grad, arrays, np.asarray(theta0, dtype=np.float64), spec), solves


def full_accuracy(solves: FullSolves, pairs: Pairs) -> Callable[[np.ndarray], float]:
    """``theta -> weighted pair accuracy`` of the full solution, reusing ``solves``' cache.

    Scores within the solves' certified tolerance of each other count as ties.
    """
    return lambda theta: pair_accuracy(solves.solve(theta)[0], pairs, resolution=solves.tol)


__all__ = [
    "AUTO_FRACTION", "ObjectiveSpec", "calibrate", "Objective", "localize", "pair_term", "margin_term", "penalty", "batch_arrays", "reduced_objective",
    "reduced_accuracy", "XSpaceLoss", "x_space_loss", "pair_summary", "FullSolves", "full_objective",
    "full_accuracy",
]
