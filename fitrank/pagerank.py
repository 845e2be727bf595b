"""The exact full-space PageRank solve and its adjoint gradient.

For a weighting at parameters theta, the PageRank vector x solves

    M x = (1 - alpha) v,    M = I - alpha A,    A = P + v leak^T   (dangling="teleport")
                                                A = P + diag(leak) (dangling="self")

where P holds the edge transition probabilities and ``leak = 1 - 1^T P`` the
mass that leaves each node through no edge. A is column-stochastic, so
||M^{-1}||_1 <= 1 / (1 - alpha) and any y with residual r = M y - (1 - alpha) v
satisfies ||x - y||_1 <= ||r||_1 / (1 - alpha): the certified bound reported by
every solve here and by :func:`certified_bound` for approximations made elsewhere.

Solvers: power iteration (the fixed point x <- alpha A x + (1 - alpha) v; its
update is exactly minus the residual, so the stopping test costs nothing),
Gauss-Seidel sweeps over random classes of nodes (:mod:`fitrank.sweeps`: one
pass over the edges per sweep like a power step, about 0.6 times as many
sweeps on fast-mixing graphs, certified by a residual bound the sweep computes
anyway), BiCGSTAB on M x = b (fewer mat-vecs at damping close to 1) and Anderson
acceleration of the power map (one mat-vec per step, like power iteration, and
fewer of them when a few slow eigen-directions stand out of the spectrum; its
least squares costs about 3 x window vector operations per step, which on
graphs of ~10 edges a node outweighs the mat-vecs it saves, so "auto" does not
use it). All reuse one CSR pattern per graph; only the data array changes with theta.

References:
  Page, Brin, Motwani, Winograd, "The PageRank citation ranking", Stanford
  tech. report 1999-66; Langville & Meyer, "Deeper inside PageRank", Internet
  Mathematics 1(3), 2004 (dangling nodes, the linear-system form and the
  bound on ||M^{-1}||_1); van der Vorst, "Bi-CGSTAB", SIAM J. Sci. Stat.
  Comput. 13(2), 1992; Walker & Ni, "Anderson acceleration for fixed-point
  iterations", SIAM J. Numer. Anal. 49(4), 2011.
"""

from __future__ import annotations

import functools
import hashlib
import json
import time
from dataclasses import dataclass, field, replace
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fitrank.errors import ConvergenceError, FitrankInputError
from fitrank.graph import Graph, check_teleport
from fitrank.sweeps import SweepPlan, cached_sweep_plan, gauss_seidel
from fitrank.weightings import Weighting

DANGLING_POLICIES = ("teleport", "self")
METHODS = ("auto", "power", "gauss-seidel", "bicgstab", "anderson")


@dataclass(frozen=True)
class SolveReport:
    """How an iterative solve ended.

    Attributes:
      converged: the tolerance was met.
      iterations: mat-vecs with the (n, n) matrix spent.
      residual: norm of the last residual M y - b that was measured (L1 for
        the PageRank solve, max-norm for the adjoint solve).
      bound: certified error of the returned vector in the same norm.
      method: the solver that produced it.
      seconds: wall time.
    """

    converged: bool
    iterations: int
    residual: float
    bound: float
    method: str
    seconds: float


@dataclass(frozen=True)
class PageRankResult:
    """A full PageRank vector x (n,), summing to 1, with its :class:`SolveReport`."""

    x: np.ndarray
    report: SolveReport


@dataclass(frozen=True, eq=False)
class WalkOperator:
    """The damped walk of one weighting at one theta: everything M(theta) needs.

    Attributes:
      matrix: (n, n) CSR, P(theta) (rows = targets).
      leak: (n,) mass each node sends through no edge (1 for a dangling node).
      teleport: (n,) teleport distribution v, sums to 1.
      damping: alpha in (0, 1).
      dangling: ``"teleport"`` (leaked mass follows v) or ``"self"`` (it stays).
      transition: (E,) the edge probabilities behind ``matrix``.
      sweep_plan: zero-argument callable returning the graph's
        :class:`~fitrank.sweeps.SweepPlan` (built on first use, cached on the
        graph); None when the operator was assembled without its graph, which
        rules out Gauss-Seidel sweeps.
    """

    matrix: sp.csr_matrix
    leak: np.ndarray
    teleport: np.ndarray
    damping: float
    dangling: str
    transition: np.ndarray
    sweep_plan: Callable[[], SweepPlan] | None = None
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def n(self) -> int:
        return self.matrix.shape[0]

    @property
    def leaky(self) -> np.ndarray:
        """Indices of the nodes with a non-zero leak (usually few: the dangling nodes)."""
        if "leaky" not in self._cache:
            self._cache["leaky"] = np.flatnonzero(self.leak)
        return self._cache["leaky"]

    def walk(self, x: np.ndarray) -> np.ndarray:
        """A x: one step of the undamped walk, (n,) or (n, k) -> same shape."""
        y = self.matrix @ x
        # Sum the leak over the leaking nodes only, without a BLAS dot: a threaded dot
        # after a mat-vec can stall for milliseconds waking its threads.
        leaky = self.leaky
        leaked = self.leak[leaky, None] * x[leaky] if x.ndim == 2 else self.leak[leaky] * x[leaky]
        if self.dangling == "teleport":
            y += np.multiply.outer(self.teleport, leaked.sum(axis=0)) if x.ndim == 2 else self.teleport * leaked.sum()
        else:
            y[leaky] += leaked
        return y

    def walk_transposed(self, y: np.ndarray) -> np.ndarray:
        """A^T y, (n,) -> (n,)."""
        z = self.matrix.T @ y
        leaky = self.leaky
        if self.dangling == "teleport":
            z[leaky] += self.leak[leaky] * np.multiply(self.teleport, y).sum()
        else:
            z[leaky] += self.leak[leaky] * y[leaky]
        return z

    def apply(self, x: np.ndarray) -> np.ndarray:
        """M x = x - alpha A x, (n,) or (n, k) -> same shape."""
        return x - self.damping * self.walk(x)

    def rhs(self) -> np.ndarray:
        """(n,) b = (1 - alpha) v."""
        return (1.0 - self.damping) * self.teleport

    def residual(self, y: np.ndarray) -> np.ndarray:
        """(n,) r = M y - (1 - alpha) v."""
        return self.apply(y) - self.rhs()


def check_walk_settings(damping: float, dangling: str) -> None:
    """Raise FitrankInputError unless 0 < damping < 1 and ``dangling`` is a known policy."""
    if not 0.0 < damping < 1.0:
        raise FitrankInputError(f"damping must be strictly between 0 and 1, got {damping}")
    if dangling not in DANGLING_POLICIES:
        raise FitrankInputError(f"dangling policy must be one of {DANGLING_POLICIES}, got '{dangling}'")


def walk_operator(
    graph: Graph,
    weighting: Weighting,
    theta,
    *,
    damping: float = 0.85,
    teleport=None,
    dangling: str = "teleport",
) -> WalkOperator:
    """Assemble M(theta) for ``graph`` under ``weighting``.

    Args:
      graph: the graph.
      weighting: a weighting built on ``graph``.
      theta: (p,) parameters.
      damping: alpha, strictly between 0 and 1.
      teleport: (n,) teleport weights, default the graph's (uniform unless the
        data gave node weights).
      dangling: ``"teleport"`` or ``"self"``.

    Returns:
      The operator; building it costs one evaluation of the weighting on all edges.
    """
    check_walk_settings(damping, dangling)
    theta = np.asarray(theta, dtype=np.float64)
    if theta.shape != (weighting.num_params,):
        raise FitrankInputError(
            f"theta has shape {theta.shape}; the {weighting.kind} weighting has {weighting.num_params} parameters"
        )
    if not np.all(np.isfinite(theta)):
        bad = int(np.argmin(np.isfinite(theta)))
        raise FitrankInputError(f"theta has a non-finite entry ({weighting.param_names[bad]} = {theta[bad]}); "
                                "PageRank is defined for finite parameters only")
    v = check_teleport(graph.teleport if teleport is None else teleport, graph.n)

    def transition(at: np.ndarray) -> np.ndarray:
        # NumPy, not JAX: the same formula, and a single solve pays no compile (0.2 s at 1M edges); a weight
        # that leaves the float range is reported below, in one line, instead of by NumPy's warning first
        with np.errstate(all="ignore"):
            return np.asarray(weighting.transition(at, weighting.tables, xp=np), dtype=np.float64)

    p = transition(theta)
    if not np.all(np.isfinite(p)):
        # caught here, a solver would iterate to maxiter on NaN before failing
        bad = int(np.argmin(np.isfinite(p)))
        source, target = graph.node_ids[graph.src[bad]], graph.node_ids[graph.dst[bad]]
        where = f"the {weighting.kind} weighting gives a non-finite transition probability on the edge {source} -> {target}"
        if np.all(np.isfinite(transition(weighting.theta0))):  # the data are fine: theta is too far out for float64
            raise FitrankInputError(
                f"{where} at parameters this far out (largest |theta| = {np.abs(theta).max():.3g}): its weights "
                "leave the float range; narrow weighting.bound or raise training.regularization")
        raise FitrankInputError(f"{where}; check that edge's weight and features")
    leak = weighting.leak_basis @ np.asarray(weighting.leak_coefficients(theta, xp=np), dtype=np.float64)
    return WalkOperator(graph.matrix(p), leak, v, float(damping), dangling, p,
                        functools.partial(cached_sweep_plan, graph))


# ----------------------------------------------------------------------------- solvers


def _power(step: Callable, b: np.ndarray, x0: np.ndarray, alpha: float, norm: Callable,
           tol: float, maxiter: int, callback) -> tuple[np.ndarray, int, float, float, bool]:
    """Iterate z <- step(z) + b, with step = alpha A and ||A|| <= 1 in ``norm``."""
    target = tol * norm(b)
    z, residual, buffer = x0, np.inf, np.empty_like(x0)
    for it in range(1, maxiter + 1):
        z_next = step(z)
        z_next += b
        np.subtract(z_next, z, out=buffer)
        residual = norm(buffer)  # = ||M z - b||: the update is minus the residual
        z = z_next
        if callback is not None:
            callback(it, residual)
        if residual <= target:
            # ||z_next - z*|| <= alpha ||z - z*|| <= alpha ||r(z)|| / (1 - alpha)
            return z, it, residual, alpha * residual / (1 - alpha), True
    return z, maxiter, residual, alpha * residual / (1 - alpha), False


def _bicgstab(apply: Callable, b: np.ndarray, x0: np.ndarray, alpha: float, norm: Callable,
              tol: float, maxiter: int, callback) -> tuple[np.ndarray, int, float, float, bool]:
    """BiCGSTAB on M z = b, stopped by the exact residual in ``norm`` (checked once per restart)."""
    count = [0]

    def matvec(z):
        count[0] += 1
        return apply(z)

    op = spla.LinearOperator((b.size, b.size), matvec=matvec, dtype=np.float64)
    target = tol * norm(b)
    z, rtol, residual = x0, tol, np.inf
    while True:
        # two mat-vecs per BiCGSTAB step, plus one for its initial residual and one for our check
        steps = (maxiter - count[0] - 2) // 2
        if steps < 1:
            break
        z_new, info = spla.bicgstab(op, b, x0=z, rtol=rtol, atol=0.0, maxiter=steps)
        if not np.all(np.isfinite(z_new)):
            break  # breakdown: keep the last finite iterate and let the caller report it
        z = z_new
        residual = norm(matvec(z) - b)
        if callback is not None:
            callback(count[0], residual)
        if residual <= target:
            return z, count[0], residual, residual / (1 - alpha), True
        if info < 0:
            break
        rtol = max(rtol * 0.1, 1e-15)  # the 2-norm test was met but the L1/max test not: tighten
    return z, count[0], residual, residual / (1 - alpha), False


_WINDOW = 5


def _anderson(step: Callable, b: np.ndarray, x0: np.ndarray, alpha: float, norm: Callable,
              tol: float, maxiter: int, callback, window: int = _WINDOW) -> tuple[np.ndarray, int, float, float, bool]:
    """Anderson acceleration (type II) of the fixed point z <- step(z) + b, one mat-vec per step.

    Each step maps z_k to g_k = step(z_k) + b, whose difference f_k = g_k - z_k is
    exactly minus the residual of z_k, and moves to g_k - dG gamma, where gamma fits
    f_k by the last ``window`` differences dF of the f's in least squares and dG are
    the matching differences of the g's. For a linear map this is a GMRES-like
    method with a short memory: it removes the few slowest eigen-directions that
    power iteration leaves for last. The returned z is the last iterate whose
    residual was measured, so ``residual`` is its own and ``bound`` certifies it.
    A step that does not improve on the best residual so far empties the memory
    (a restart; the next step is a plain power step).

    Args:
      step: z -> alpha A z, (n,) -> (n,), with ||A|| <= 1 in ``norm``.
      b: (n,) right-hand side.
      x0: (n,) start.
      alpha: damping, for the bound ||z - z*|| <= ||r|| / (1 - alpha).
      norm: the residual norm (L1 or max).
      tol: stop when ||r|| <= tol ||b||.
      maxiter: at most this many mat-vecs.
      callback: None or called as callback(mat-vecs, residual).
      window: how many differences the least squares keeps.

    Returns:
      (z (n,), mat-vecs, ||M z - b||, certified bound on ||z - z*||, converged).

    References:
      Walker & Ni, "Anderson acceleration for fixed-point iterations", SIAM J.
      Numer. Anal. 49(4), 2011 (type II update with mixing 1; for linear maps
      essentially GMRES).
    """
    target = tol * norm(b)
    d_f, d_g = np.zeros((window, b.size)), np.zeros((window, b.size))
    gram = np.zeros((window, window))
    z, f_prev, g_prev, stored, slot, best, residual, it = x0, None, None, 0, 0, np.inf, np.inf, 0
    for it in range(1, maxiter + 1):
        g = step(z)
        g += b
        f = g - z
        residual = norm(f)
        if callback is not None:
            callback(it, residual)
        if residual <= target or it == maxiter:
            break
        if residual > best:  # the memory misleads: forget it
            f_prev, stored, slot = None, 0, 0
        best = min(best, residual)
        z_next = g
        if f_prev is not None:
            np.subtract(f, f_prev, out=d_f[slot])
            np.subtract(g, g_prev, out=d_g[slot])
            stored = min(stored + 1, window)
            row = d_f[:stored] @ d_f[slot]
            gram[slot, :stored], gram[:stored, slot] = row, row
            slot = (slot + 1) % window
            gamma = _small_least_squares(gram[:stored, :stored], d_f[:stored] @ f)
            z_next = g - gamma @ d_g[:stored]
        f_prev, g_prev, z = f, g, z_next
    return z, it, residual, residual / (1 - alpha), residual <= target


def _small_least_squares(gram: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """gamma (m,) minimising ||dF^T gamma - f||_2 from its normal equations gram = dF dF^T, rhs = dF f.

    The columns are equilibrated first and near-dependent directions dropped (SVD cut-off),
    because differences of successive residuals become nearly parallel as the iteration settles.
    """
    scale = np.sqrt(np.maximum(np.diag(gram), np.finfo(float).tiny))
    solution = np.linalg.lstsq(gram / np.outer(scale, scale), rhs / scale, rcond=1e-13)[0]
    return solution / scale


_PROBE_STEPS = 8
_SLOW_RATE = 0.6
_SWEEPS_PAY_OFF = 16
"""Power steps still needed after the probe above which "auto" switches to Gauss-Seidel sweeps.
Measured on the generated 1M-edge graph (experiments/bench_full_solver.py): a sweep costs about
1.2 power steps and setting the sweeps up about 2-5 more (5 when the graph's plan is first built),
and sweeps need about 0.6 times the steps, so they pay off from about 16 remaining steps."""


def _solve(method: str, damping: float, step, apply, b, x0, norm, tol, maxiter, callback, sweeps=None):
    """Run ``method`` on M z = b; ``sweeps(x0, tol, maxiter, callback)`` runs Gauss-Seidel (None: unavailable)."""
    if method not in METHODS:
        raise FitrankInputError(f"solver method must be one of {METHODS}, got '{method}'")
    if method == "gauss-seidel" and sweeps is None:
        raise FitrankInputError("solver method 'gauss-seidel' needs the graph's sweep plan: assemble the operator "
                                "with walk_operator (it is not available for the adjoint solve); use 'auto' or 'power'")
    start = time.perf_counter()
    its, used = 0, method
    if method == "auto":
        # Power iteration contracts by the walk's own mixing rate (at most alpha) per
        # mat-vec. On a fast-mixing graph Gauss-Seidel sweeps (same cost, one pass over
        # the edges) contract faster still; on a slow one a Krylov method needs far
        # fewer mat-vecs. Probe a few steps, measure, then choose. (Threshold: measured
        # in experiments/bench_full_solver.py; common practice otherwise only says
        # "Krylov when damping is close to 1".)
        history = []

        def probe_callback(it, residual):
            history.append(residual)
            if callback is not None:
                callback(it, residual)

        z, its, res, bound, ok = _power(step, b, x0, damping, norm, tol, min(_PROBE_STEPS, maxiter), probe_callback)
        if ok or its >= maxiter:
            return z, SolveReport(ok, its, float(res), float(bound), "power", time.perf_counter() - start)
        rate = (history[-1] / history[-5]) ** 0.25 if len(history) >= 5 and history[-5] > 0 else 1.0
        x0 = z
        if rate > _SLOW_RATE:
            used = "bicgstab"
        else:
            remaining = np.log(tol * norm(b) / res) / np.log(max(rate, 1e-3))
            used = "gauss-seidel" if sweeps is not None and remaining > _SWEEPS_PAY_OFF else "power"
    if used == "power":
        z, more, res, bound, ok = _power(step, b, x0, damping, norm, tol, maxiter - its, callback)
    elif used == "anderson":
        z, more, res, bound, ok = _anderson(step, b, x0, damping, norm, tol, maxiter - its, callback)
    else:
        if used == "gauss-seidel":
            z, more, res, bound, ok = sweeps(x0, tol, maxiter - its, callback)
        else:
            z, more, res, bound, ok = _bicgstab(apply, b, x0, damping, norm, tol, maxiter - its, callback)
        if not ok and its + more < maxiter:  # breakdown or stall: finish with the always-convergent iteration
            its += more
            z, more, res, bound, ok = _power(step, b, z, damping, norm, tol, maxiter - its, callback)
            used = f"{used}+power"
    its += more
    if method == "auto":
        used = "power" if used == "power" else f"power+{used}"
    return z, SolveReport(ok, its, float(res), float(bound), used, time.perf_counter() - start)


def _l1(z):
    return float(np.abs(z).sum())


def _linf(z):
    return float(np.abs(z).max())


def solve_operator(op: WalkOperator, *, tol: float = 1e-10, maxiter: int = 10_000, method: str = "auto",
                   x0=None, callback=None, raise_on_failure: bool = True) -> PageRankResult:
    """Solve M x = (1 - alpha) v for an assembled operator. See :func:`pagerank`."""
    b = op.rhs()
    x0 = op.teleport.copy() if x0 is None else np.asarray(x0, dtype=np.float64) / np.sum(x0)
    sweeps = None
    if op.sweep_plan is not None:
        def sweeps(start, tol_, maxiter_, callback_):
            return gauss_seidel(op.sweep_plan(), op.transition, op.leak, op.teleport, op.damping, op.dangling,
                                start, tol_, maxiter_, callback_)
    x, report = _solve(method, op.damping, lambda z: op.damping * op.walk(z), op.apply, b, x0, _l1, tol,
                       maxiter, callback, sweeps)
    if not report.converged and raise_on_failure:
        raise ConvergenceError("PageRank solve", report.iterations, report.residual, report.bound, tol)
    return _normalised(x, report, op.damping)


def _normalised(x: np.ndarray, report: SolveReport, damping: float) -> PageRankResult:
    """x / sum(x), with the report widened by what the rescaling can cost.

    With s = sum(x), sum(x*) = 1 and b = (1 - alpha) v:
    ||x/s - x*||_1 <= (||x - x*||_1 + |1 - s|) / s and
    ||M x/s - b||_1 <= (||M x - b||_1 + (1 - alpha) |1 - s|) / s. The solvers keep
    s = 1 up to rounding (their steps are affine combinations of vectors summing to 1),
    so this changes the report by rounding only, but it keeps it a certificate.

    Args:
      x: (n,) the solver's vector.
      report: its report (a residual of x or an upper bound on it, and a bound for x).
      damping: alpha.

    Returns:
      the normalised vector (n,) with the widened report.
    """
    total = float(x.sum())
    drift = abs(1.0 - total)
    residual = (report.residual + (1.0 - damping) * drift) / total
    bound = (report.bound + drift) / total
    return PageRankResult(x / total, replace(report, residual=residual, bound=bound))


def pagerank(
    graph: Graph,
    weighting: Weighting,
    theta,
    *,
    damping: float = 0.85,
    teleport=None,
    dangling: str = "teleport",
    tol: float = 1e-10,
    maxiter: int = 10_000,
    method: str = "auto",
    x0=None,
    callback: Callable[[int, float], None] | None = None,
) -> PageRankResult:
    """The PageRank vector of ``graph`` with edge weights ``weighting`` at ``theta``.

    Args:
      graph: the graph.
      weighting: a weighting built on ``graph``.
      theta: (p,) parameters.
      damping: alpha in (0, 1); 0.85 by default (common practice).
      teleport: (n,) non-negative teleport weights, not all zero; default the graph's.
      dangling: where leaked mass goes: ``"teleport"`` (follows v) or ``"self"``.
      tol: stop when the certified L1 error ||x - x_true||_1 is at most ``tol``
        (checked as ||r||_1 <= tol (1 - alpha)).
      maxiter: at most this many mat-vecs (a Gauss-Seidel sweep counts as one: one pass over the edges).
      method: ``"power"``, ``"gauss-seidel"`` (normalised sweeps, :mod:`fitrank.sweeps`),
        ``"bicgstab"``, ``"anderson"`` (Anderson-accelerated power iteration) or
        ``"auto"``: 8 power steps, then BiCGSTAB when they show slow contraction,
        Gauss-Seidel sweeps when more than 16 power steps would remain, else power.
      x0: (n,) starting vector (warm start), default v.
      callback: called as ``callback(iteration, residual)`` after each check.

    Returns:
      :class:`PageRankResult` with x (n,), x >= 0 up to rounding, sum(x) = 1.

    Raises:
      ConvergenceError: maxiter reached before tol; reports iterations,
        residual and the certified bound.
    """
    op = walk_operator(graph, weighting, theta, damping=damping, teleport=teleport, dangling=dangling)
    return solve_operator(op, tol=tol, maxiter=maxiter, method=method, x0=x0, callback=callback)


def certified_bound(op: WalkOperator, y: np.ndarray) -> float:
    """Certified ||x_true - y||_1 <= min(||M y - (1 - alpha) v||_1 / (1 - alpha), 1 + ||y||_1) for any (n,) y.

    The second term holds because x_true is a probability vector (||x_true||_1
    = 1): it is what remains when damping near 1 makes the first useless (770
    against a true error of 9e-4 at damping 0.999999, seen on a chain graph).
    Costs one sparse mat-vec. References: Langville & Meyer 2004 (||M^{-1}||_1
    <= 1/(1-alpha)); the triangle inequality.
    """
    y = np.asarray(y, dtype=np.float64)
    return min(_l1(op.residual(y)) / (1.0 - op.damping), 1.0 + _l1(y))


# ----------------------------------------------------------------------------- gradient


def adjoint_gradient(
    graph: Graph,
    weighting: Weighting,
    theta,
    x: np.ndarray,
    dfdx: np.ndarray,
    *,
    op: WalkOperator | None = None,
    damping: float = 0.85,
    teleport=None,
    dangling: str = "teleport",
    tol: float = 1e-12,
    maxiter: int = 10_000,
    method: str = "auto",
) -> tuple[np.ndarray, SolveReport]:
    """Exact gradient d f(x(theta)) / d theta by one transposed solve.

    With M^T lam = df/dx, the gradient is -lam^T (dM/dtheta) x
    = alpha * d/dtheta [ sum_e lam_dst(e) x_src(e) p_e(theta) + route(lam, x) . c(theta) ],
    evaluated as one JAX vector-Jacobian product of the weighting.

    Args:
      graph, weighting, theta: as for :func:`pagerank`.
      x: (n,) the PageRank vector at theta.
      dfdx: (n,) gradient of the scalar f with respect to x.
      op: the operator at theta if already built (saves one weighting evaluation).
      damping, teleport, dangling: as for :func:`pagerank` (ignored when op is given).
      tol: relative tolerance of the adjoint solve (max-norm residual <= tol ||df/dx||_inf).
      maxiter, method: as for :func:`pagerank`.

    Returns:
      (grad (p,), report of the adjoint solve).

    References:
      Adjoint (reverse-mode) sensitivity of a linear system: Giles & Pierce,
      "An introduction to the adjoint approach to design", Flow, Turbulence and
      Combustion 65, 2000.
    """
    if op is None:
        op = walk_operator(graph, weighting, theta, damping=damping, teleport=teleport, dangling=dangling)
    g = np.asarray(dfdx, dtype=np.float64)
    alpha = op.damping
    # Solve for lam / max|g| instead: a loss far out on its flat tail has df/dx near 1e-200, whose
    # squares underflow inside BiCGSTAB, which then never converges. A power of two keeps every
    # operation exact, so an ordinary right-hand side gives the same solve to the last bit.
    size = _linf(g)
    scale = 2.0 ** -np.clip(np.round(np.log2(size)), -1000, 1000) if size > 0 and np.isfinite(size) else 1.0
    g = g * scale
    apply_t = lambda z: z - alpha * op.walk_transposed(z)  # noqa: E731
    lam, report = _solve(method, alpha, lambda z: alpha * op.walk_transposed(z), apply_t, g, g.copy(), _linf,
                         tol, maxiter, None)
    if not report.converged:
        raise ConvergenceError("adjoint solve (residual and bound relative to max |df/dx|)", report.iterations,
                               report.residual, report.bound, tol)
    lam = lam / scale
    report = replace(report, residual=report.residual / scale, bound=report.bound / scale)
    edge_cot = lam[graph.dst] * x[graph.src]
    routed = lam @ op.teleport * x if op.dangling == "teleport" else lam * x
    leak_cot = weighting.leak_basis.T @ routed

    def walk_terms(th):
        return weighting.transition(th, weighting.tables), weighting.leak_coefficients(th)

    _, pullback = jax.vjp(walk_terms, jnp.asarray(theta, dtype=jnp.float64))
    (grad,) = pullback((jnp.asarray(edge_cot), jnp.asarray(leak_cot)))
    return alpha * np.asarray(grad), report


# ----------------------------------------------------------------------------- problem


@dataclass(frozen=True, eq=False)
class PageRankProblem:
    """One graph, weighting, damping, teleport and dangling policy: x(theta) is defined.

    Reduced models are built for, and saved with the fingerprint of, one problem.

    Attributes:
      graph: the graph.
      weighting: a weighting built on ``graph``.
      damping: alpha in (0, 1).
      teleport: (n,) validated teleport distribution.
      dangling: ``"teleport"`` or ``"self"``.
    """

    graph: Graph
    weighting: Weighting
    damping: float = 0.85
    teleport: np.ndarray | None = None
    dangling: str = "teleport"

    def __post_init__(self):
        check_walk_settings(self.damping, self.dangling)
        v = self.graph.teleport if self.teleport is None else self.teleport
        object.__setattr__(self, "teleport", check_teleport(v, self.graph.n))

    def operator(self, theta) -> WalkOperator:
        """M(theta) as a :class:`WalkOperator`."""
        return walk_operator(self.graph, self.weighting, theta, damping=self.damping, teleport=self.teleport,
                             dangling=self.dangling)

    def solve(self, theta, **solver_options) -> PageRankResult:
        """x(theta); keyword options as for :func:`solve_operator`."""
        return solve_operator(self.operator(theta), **solver_options)

    def fingerprint(self) -> str:
        """A short hash of the graph, the weighting (kind and options), damping, teleport and policy."""
        h = hashlib.sha256(self.graph.fingerprint().encode())
        h.update(json.dumps([self.weighting.kind, self.weighting.options, self.damping, self.dangling],
                            sort_keys=True, default=str).encode())
        h.update(np.ascontiguousarray(self.teleport).tobytes())
        return h.hexdigest()[:16]
