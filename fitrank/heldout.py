"""A reduced model against full solves at parameter points it was not built from.

The offline stage knows its basis's singular values and the rows it chose,
but not how well the model ranks at a point it has never seen; a few full
solves at fresh points answer that before the model is trusted (``fitrank
build`` runs :func:`held_out_check` and prints the worst case).

The fresh points continue the scrambled Sobol sequence the build sampled
(same seed, the next ``points`` terms): they are never among the snapshots,
they fill the domain's gaps between them, and the same build always checks
the same points.
"""

from __future__ import annotations

import time
from concurrent.futures import Executor
from dataclasses import dataclass

import numpy as np

from fitrank.metrics import REFERENCE_TOL, agreement_with_solve, within_tolerance
from fitrank.reduced import ReducedModel
from fitrank.regions import RegionalModel
from fitrank.snapshots import solve_snapshots


@dataclass(frozen=True)
class HeldOutCheck:
    """Accuracy of a reduced model at fresh parameter points, against full solves.

    Attributes:
      thetas: (m, p) the points.
      tau: (m,) Kendall tau-b on each full solution's top-k.
      l1: (m,) normalised L1 error on that top-k.
      bound: (m,) certified L1 error of the reduced vector (one residual each).
      error: (m,) its L1 error against the full solve.
      top_k: k of the top-k measures.
      passed: every point met ``tau_min`` and ``l1_max``.
      seconds: wall time, full solves included.
    """

    thetas: np.ndarray
    tau: np.ndarray
    l1: np.ndarray
    bound: np.ndarray
    error: np.ndarray
    top_k: int
    passed: bool
    seconds: float

    def summary(self) -> dict:
        """The JSON-ready worst case: ``points``, ``tau_topk_min``, ``l1_topk_max``, ``bound_max``, ``passed``, ...

        A NaN tau (a full solution that ties its whole top-k) does not count as the worst.
        """
        taus = self.tau[np.isfinite(self.tau)]
        return {"points": int(self.thetas.shape[0]), "top_k": self.top_k,
                "tau_topk_min": float(taus.min()) if taus.size else float("nan"),
                "l1_topk_max": float(self.l1.max()), "bound_max": float(self.bound.max()),
                "error_max": float(self.error.max()), "passed": self.passed, "seconds": self.seconds}


def fresh_points(model: ReducedModel | RegionalModel, points: int) -> np.ndarray:
    """(points, p) parameter points past the build's samples in its own Sobol sequence.

    Args:
      model: a built model (its settings give the sequence's seed and length).
      points: how many.
    """
    settings = model.settings
    return model.problem.weighting.sample(settings.samples + points, seed=settings.seed)[settings.samples:]


def held_out_check(model: ReducedModel | RegionalModel, points: int = 4, *, top_k: int = 100,
                   tau_min: float = 0.999, l1_max: float = 1e-3, tol: float = 1e-10,
                   executor: Executor | None = None, progress: bool = True) -> HeldOutCheck:
    """Compare ``model`` with full solves at ``points`` fresh parameter points (:func:`fresh_points`).

    Args:
      model: the reduced model (either kind).
      points: how many points (>= 1); each costs one full solve and one residual.
      top_k, tau_min, l1_max: the measures and the tolerances every point must meet.
      tol: certified L1 error of the full solves, at most :data:`~fitrank.metrics.REFERENCE_TOL`
        (a looser reference cannot order close pairs).
      executor: where the full solves run (any ``concurrent.futures.Executor``; None: here).
      progress: show a progress bar for the full solves.

    Returns:
      A :class:`HeldOutCheck`.
    """
    if int(points) < 1:
        raise ValueError(f"a held-out check needs at least one point, got {points}")
    start = time.perf_counter()
    tol = min(tol, REFERENCE_TOL)
    problem = model.problem
    top_k = min(int(top_k), problem.graph.n)  # the nodes compared: all of them on a graph smaller than top_k
    thetas = fresh_points(model, int(points))
    solutions = solve_snapshots(problem, thetas, tol=tol, executor=executor, progress=progress, label="held-out solves")
    tau, l1, bound, error, passed = [], [], [], [], True
    for theta, x in zip(thetas, solutions.T):
        y = model.vector(theta)
        point_tau, point_l1 = agreement_with_solve(x, y, k=top_k, x_bound=tol)
        passed &= within_tolerance(x, point_tau, point_l1, k=top_k, tau_min=tau_min, l1_max=l1_max, x_bound=tol)
        tau.append(point_tau)
        l1.append(point_l1)
        bound.append(model.certified_bound(theta, y))
        error.append(float(np.abs(x - y).sum()))
    return HeldOutCheck(thetas, np.array(tau), np.array(l1), np.array(bound), np.array(error), top_k,
                        bool(passed), time.perf_counter() - start)
