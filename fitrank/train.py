"""The optimisation loop: find theta that minimises an :class:`Objective`.

One loop, :func:`optimize`, serves both spaces; the two entry points only
build the objective and the validation scorer:

* :func:`train_reduced`: objective and exact gradient from a reduced model's
  scorer, one jit-compiled JAX call per step, cost independent of n;
* :func:`train_full`: full PageRank solve plus adjoint solve per evaluation,
  each warm-started from the previous solution (the reference trainer).

Optimisers come from optax: ``adam`` and ``sgd`` take fixed steps of size
``learning_rate``; ``lbfgs`` chooses its own step by a zoom line search (the
learning rate is not used). The loop stops on the first of: gradient norm
<= ``grad_tol`` (``"grad_tol"``), ``max_steps`` updates (``"max_steps"``), no
validation improvement for ``patience`` steps (``"early_stop"``), a callback
asking to stop (``"callback"``), an update that leaves theta unchanged
(``"stalled"``, e.g. a failed line search) or a non-finite loss
(``"non_finite"``).

With validation pairs the returned theta is the one with the best validation
accuracy; among equal accuracies the later (further trained) one wins, but only
a strict improvement resets the patience counter. Without validation it is the
last finite iterate.
"""

from __future__ import annotations

import contextlib
import functools
import itertools
import time
from dataclasses import dataclass, field, replace
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np
import optax
import pandas as pd
from tqdm.auto import tqdm

from fitrank import interrupt
from fitrank.errors import FitrankInputError
from fitrank.graph import Graph, Pairs
from fitrank.objective import (Objective, ObjectiveSpec, batch_arrays, full_accuracy, full_objective,
                               reduced_accuracy, reduced_objective)
from fitrank.weightings import Weighting

OPTIMIZERS = ("lbfgs", "adam", "sgd")
HISTORY_COLUMNS = ("step", "loss", "grad_norm", "valid_acc", "seconds")
STOP_REASONS = ("grad_tol", "max_steps", "early_stop", "callback", "stalled", "non_finite")


@dataclass(frozen=True)
class LoopSettings:
    """How to optimise.

    Attributes:
      optimizer: ``"lbfgs"`` (default; line search, no learning rate),
        ``"adam"`` or ``"sgd"``.
      learning_rate: step size of adam and sgd (> 0).
      max_steps: at most this many parameter updates (>= 0).
      grad_tol: stop when ||dJ/dtheta||_2 <= grad_tol (>= 0).
      patience: stop after this many steps without a strict improvement of
        validation accuracy; 0 turns early stopping off.
      batch_pairs: adam/sgd only: pairs drawn per step (0 = all pairs, full batch).
      seed: seeds the pair sampling of ``batch_pairs``; full-batch runs are
        deterministic whatever the seed.
    """

    optimizer: str = "lbfgs"
    learning_rate: float = 0.05
    max_steps: int = 200
    grad_tol: float = 1e-6
    patience: int = 20
    batch_pairs: int = 0
    seed: int = 0

    def check(self) -> None:
        """Raise FitrankInputError naming the first invalid setting."""
        problems = [
            (self.optimizer not in OPTIMIZERS, f"optimizer must be one of {', '.join(OPTIMIZERS)}, "
                                               f"got '{self.optimizer}'"),
            (not 0.0 < self.learning_rate < float("inf"), f"learning_rate must be > 0, got {self.learning_rate}"),
            (self.max_steps < 0, f"max_steps must be >= 0, got {self.max_steps}"),
            (not 0.0 <= self.grad_tol < float("inf"), f"grad_tol must be >= 0, got {self.grad_tol}"),
            (self.patience < 0, f"patience must be >= 0, got {self.patience}"),
            (self.batch_pairs < 0, f"batch_pairs must be >= 0, got {self.batch_pairs}"),
            (self.batch_pairs > 0 and self.optimizer == "lbfgs",
             "batch_pairs needs adam or sgd: a line search needs the same objective at every trial point"),
        ]
        for bad, message in problems:
            if bad:
                raise FitrankInputError(message)


@dataclass(frozen=True, eq=False)
class TrainResult:
    """The outcome of one optimisation.

    Attributes:
      theta: (p,) the chosen parameters (best validation accuracy, else the last iterate).
      history: one dict per evaluated iterate with keys :data:`HISTORY_COLUMNS`
        (``seconds`` is wall time since the start; ``valid_acc`` NaN without validation).
      steps: parameter updates performed.
      stopped_because: one of :data:`STOP_REASONS`.
      seconds: total wall time.
      per_step_seconds: median wall time of one step (objective, gradient and
        update; validation excluded), over the steps after the first, which
        includes JIT compilation; NaN when no step was taken.
      best_step: the history step whose theta is returned.
      best_valid_acc: validation accuracy at ``best_step`` (NaN without validation).
      path: (len(history), p) every evaluated iterate, in order.
      extras: ``loss_param`` (the temperature or margin used, after calibration)
        and counters of the trainer (``full_solves``, ``matvecs`` for :func:`train_full`).
    """

    theta: np.ndarray
    history: tuple[dict, ...]
    steps: int
    stopped_because: str
    seconds: float
    per_step_seconds: float
    best_step: int
    best_valid_acc: float
    path: np.ndarray
    extras: dict = field(default_factory=dict)

    def history_frame(self) -> pd.DataFrame:
        """The history as a DataFrame with columns :data:`HISTORY_COLUMNS`."""
        return pd.DataFrame(list(self.history), columns=list(HISTORY_COLUMNS))


def make_optimizer(settings: LoopSettings) -> optax.GradientTransformation:
    """The optax transformation named by ``settings.optimizer``.

    References:
      Kingma & Ba, "Adam: a method for stochastic optimization", ICLR 2015;
      Nocedal & Wright, "Numerical Optimization", 2nd ed., 2006, algorithms
      7.4-7.5 (L-BFGS) and 3.5-3.6 (zoom line search).
    """
    settings.check()
    return _optimizer(settings.optimizer, settings.learning_rate)


@functools.lru_cache(maxsize=None)
def _optimizer(name: str, learning_rate: float) -> optax.GradientTransformation:
    # One instance per setting, so the jitted step functions below compile once per process.
    if name == "lbfgs":
        return optax.lbfgs()
    return optax.adam(learning_rate) if name == "adam" else optax.sgd(learning_rate)


# The L-BFGS line search calls J at trial points inside compiled optax code. It reaches
# the objective through a host callback keyed by a token, so that code is compiled once
# per process and parameter count rather than once per objective (compiling optax's zoom
# line search takes seconds, more with a model's solve inlined several times).
_OBJECTIVES: dict[int, Objective] = {}
_TOKENS = itertools.count()
# An error raised inside a callback reaches the caller as JAX's own INTERNAL error, with the
# original only in its text: the callback records it here and returns NaN, and the step that
# called the compiled code raises the original (see _raising_failures).
_FAILURES: dict[int, Exception] = {}


def _host_value_and_grad(token, theta):
    token = int(token)
    if token not in _FAILURES:
        try:
            # JAX runs callbacks with a default device set; unset it so the objective's compiled
            # program (cached under the caller's context) is reused instead of compiled again.
            with jax.default_device(None):
                value, grad = _OBJECTIVES[token](theta)
            return np.float64(value), np.asarray(grad, dtype=np.float64)
        except Exception as err:  # noqa: BLE001  (raised again, as itself, by _raising_failures)
            _FAILURES[token] = err
    return np.float64(np.nan), np.full(np.shape(theta), np.nan)


def _raising_failures(fn, token: int):
    """``fn`` (a compiled step that calls the objective through the host callback), raising what the objective raised."""
    def run(*args):
        out = jax.block_until_ready(fn(*args))
        failure = _FAILURES.pop(token, None)
        if failure is not None:
            raise failure
        return out

    return run


def _host_shapes(theta):
    return jax.ShapeDtypeStruct((), jnp.float64), jax.ShapeDtypeStruct(theta.shape, jnp.float64)


@jax.custom_vjp
def _host_value(theta, token):
    return jax.pure_callback(_host_value_and_grad, _host_shapes(theta), token, theta)[0]


def _host_forward(theta, token):
    value, grad = jax.pure_callback(_host_value_and_grad, _host_shapes(theta), token, theta)
    return value, grad


def _host_backward(grad, cotangent):
    return cotangent * grad, None


_host_value.defvjp(_host_forward, _host_backward)


def _line_value(theta, token):
    """J(theta) of the objective registered under ``token``, differentiable in theta."""
    return _host_value(theta, token)


@functools.lru_cache(maxsize=None)
def _line_search_steps(optimizer: optax.GradientTransformation):
    from_state = optax.value_and_grad_from_state(_line_value)

    @jax.jit
    def evaluate(theta, state, token):
        # After the first step the line search has already evaluated J at the accepted point.
        return from_state(theta, token, state=state)

    @jax.jit
    def update(theta, state, value, grad, token):
        updates, state = optimizer.update(grad, state, theta, value=value, grad=grad, value_fn=_line_value,
                                          token=token)
        return optax.apply_updates(theta, updates), state

    return evaluate, update


@functools.lru_cache(maxsize=None)
def _fixed_step_update(optimizer: optax.GradientTransformation):
    @jax.jit
    def update(theta, state, grad):
        updates, state = optimizer.update(grad, state, theta)
        return optax.apply_updates(theta, updates), state

    return update


def _strong(tree):
    """The same pytree with weak types made strong: optax initialises some scalars as weakly
    typed Python numbers, which would otherwise change the jit signature after the first step
    and compile the (expensive) update a second time. Updates return strong types already."""
    return jax.tree.map(lambda leaf: jax.lax.convert_element_type(leaf, jnp.asarray(leaf).dtype), tree)


@contextlib.contextmanager
def _step_functions(objective: Objective, settings: LoopSettings):
    """(evaluate(theta, state, arrays), update(theta, state, value, grad, arrays)) for one run."""
    optimizer = make_optimizer(settings)
    if settings.optimizer != "lbfgs":
        step = _fixed_step_update(optimizer)
        yield (optimizer, lambda theta, state, arrays: objective.value_and_grad(theta, arrays),
               lambda theta, state, value, grad, arrays: step(theta, state, grad))
        return
    token = next(_TOKENS)
    _OBJECTIVES[token] = objective
    evaluate, update = _line_search_steps(optimizer)
    key = jnp.asarray(token, dtype=jnp.int64)
    try:
        yield (optimizer, _raising_failures(lambda theta, state, arrays: evaluate(theta, state, key), token),
               _raising_failures(lambda theta, state, value, grad, arrays: update(theta, state, value, grad, key),
                                 token))
    finally:
        del _OBJECTIVES[token]
        _FAILURES.pop(token, None)


def optimize(
    objective: Objective,
    theta_init,
    settings: LoopSettings = LoopSettings(),
    *,
    valid: Callable[[np.ndarray], float] | None = None,
    callback: Callable[[dict, np.ndarray], bool | None] | None = None,
    progress: bool = True,
    label: str = "training",
) -> TrainResult:
    """Minimise ``objective`` from ``theta_init``.

    Args:
      objective: any :class:`fitrank.objective.Objective`.
      theta_init: (p,) starting point (theta0, or a previous optimum to warm-start).
      settings: optimiser and stopping rules.
      valid: ``theta (p,) -> validation accuracy``, evaluated at every iterate;
        enables early stopping and best-theta selection.
      callback: called with (history row, theta (p,)) after every evaluation;
        returning True stops the loop.
      progress: show a progress bar (step, loss, validation accuracy) on stderr.
      label: text in front of the progress bar.

    Returns:
      :class:`TrainResult`.
    """
    rng = np.random.default_rng(settings.seed)
    theta = jnp.asarray(np.asarray(theta_init, dtype=np.float64))
    rows, path, durations = [], [], []
    best_theta, best_acc, best_step, since_best = np.asarray(theta), -np.inf, 0, 0
    stop, step, start = None, 0, time.perf_counter()
    with _step_functions(objective, settings) as (optimizer, evaluate, update), \
            tqdm(total=settings.max_steps, desc=label, unit="step", disable=not progress, leave=False) as bar:
        state = _strong(optimizer.init(theta))
        while stop is None:
            interrupt.checkpoint()
            tick = time.perf_counter()
            arrays = batch_arrays(objective, rng, settings.batch_pairs)
            value, grad = evaluate(theta, state, arrays)
            with np.errstate(over="ignore", invalid="ignore"):  # a norm that overflows is caught just below
                loss, grad_norm = float(value), float(np.linalg.norm(np.asarray(grad)))
            seconds = time.perf_counter() - tick
            current = np.asarray(theta)
            if not (np.isfinite(loss) and np.isfinite(grad_norm)):
                stop = "non_finite"
                break
            accuracy = float(valid(current)) if valid is not None else float("nan")
            row = {"step": step, "loss": loss, "grad_norm": grad_norm, "valid_acc": accuracy,
                   "seconds": time.perf_counter() - start}
            rows.append(row)
            path.append(current)
            if valid is None or accuracy > best_acc:
                best_theta, best_acc, best_step, since_best = current, accuracy, step, 0
            else:
                since_best += 1
                if accuracy == best_acc:
                    best_theta, best_step = current, step
            bar.set_postfix_str(f"loss {loss:.5g}  valid {accuracy:.4f}", refresh=False)
            if grad_norm <= settings.grad_tol:
                stop = "grad_tol"
            elif valid is not None and settings.patience and since_best >= settings.patience:
                stop = "early_stop"
            elif callback is not None and callback(dict(row), current):
                stop = "callback"
            elif step >= settings.max_steps:
                stop = "max_steps"
            else:
                tick = time.perf_counter()
                new_theta, state = jax.block_until_ready(update(theta, state, value, grad, arrays))
                durations.append(seconds + time.perf_counter() - tick)
                if np.array_equal(np.asarray(new_theta), current):
                    stop = "stalled"
                else:
                    theta, step = new_theta, step + 1
                    if step == 1:  # the first step compiles: time the rate, hence the ETA, from the second on
                        bar.reset()
                    bar.update(1)
    if valid is None:
        best_acc = float("nan")
    return TrainResult(
        theta=np.asarray(best_theta, dtype=np.float64),
        history=tuple(rows),
        steps=step,
        stopped_because=stop,
        seconds=time.perf_counter() - start,
        per_step_seconds=float(np.median(durations[1:] or durations)) if durations else float("nan"),
        best_step=best_step,
        best_valid_acc=float(best_acc),
        # the width is given, not -1: a path with no finite iterate has none to infer
        path=np.asarray(path, dtype=np.float64).reshape(len(path), theta.shape[0]),
        extras={"loss_param": objective.spec.loss_param},
    )


def train_reduced(
    scorer,
    train_pairs: Pairs,
    spec: ObjectiveSpec,
    *,
    n: int,
    theta0,
    settings: LoopSettings = LoopSettings(),
    theta_init=None,
    valid_pairs: Pairs | None = None,
    valid_scorer=None,
    callback=None,
    progress: bool = True,
) -> TrainResult:
    """Train in the reduced space: J and dJ/dtheta are exact derivatives of the reduced model.

    Args:
      scorer: ``model.scorer(train_pairs.nodes())`` of a reduced model (any
        object with ``fn``, ``arrays``, ``nodes`` as ``fitrank.reduced.Scorer``).
      train_pairs: the training split.
      spec: loss and regularisation.
      n: number of graph nodes.
      theta0: (p,) regularisation target (``weighting.theta0``).
      settings: optimiser and stopping rules.
      theta_init: (p,) start, default theta0 (pass a previous optimum to warm-start).
      valid_pairs: the validation split, for early stopping and best-theta choice
        (None or empty: no early stopping).
      valid_scorer: a scorer covering ``valid_pairs``' nodes (``model.scorer(valid_pairs.nodes())``);
        default ``scorer``, which must then cover them.
      callback, progress: see :func:`optimize`.

    Returns:
      :class:`TrainResult`.
    """
    objective = reduced_objective(scorer, train_pairs, spec, n=n, theta0=theta0)
    valid = None
    if valid_pairs is not None and len(valid_pairs):
        valid = reduced_accuracy(scorer if valid_scorer is None else valid_scorer, valid_pairs)
    start = theta0 if theta_init is None else theta_init
    return optimize(objective, start, settings, valid=valid, callback=callback, progress=progress,
                    label="reduced training")


def train_full(
    graph: Graph,
    weighting: Weighting,
    train_pairs: Pairs,
    spec: ObjectiveSpec,
    *,
    theta0=None,
    settings: LoopSettings = LoopSettings(),
    theta_init=None,
    valid_pairs: Pairs | None = None,
    damping: float = 0.85,
    teleport=None,
    dangling: str = "teleport",
    tol: float = 1e-10,
    callback=None,
    progress: bool = True,
) -> TrainResult:
    """Train in the full space: each evaluation is a full solve plus an adjoint solve.

    Same loss, regularisation and loop as :func:`train_reduced`; every solve is
    warm-started from the previous solution, and validation accuracy reuses
    the solve already made at that theta.

    Args:
      graph, weighting: the problem.
      train_pairs: the training split.
      spec: loss and regularisation.
      theta0: (p,) regularisation target, default ``weighting.theta0``.
      settings: optimiser and stopping rules.
      theta_init: (p,) start, default theta0.
      valid_pairs: the validation split (None or empty: no early stopping).
      damping, teleport, dangling: the PageRank model.
      tol: certified L1 tolerance of each full solve.
      callback, progress: see :func:`optimize`.

    Returns:
      :class:`TrainResult` whose ``extras`` also hold ``full_solves`` and ``matvecs``
      (forward solves only; each gradient adds one transposed solve).
    """
    theta0 = weighting.theta0 if theta0 is None else theta0
    objective, solves = full_objective(graph, weighting, train_pairs, spec, theta0=theta0, damping=damping,
                                       teleport=teleport, dangling=dangling, tol=tol)
    valid = full_accuracy(solves, valid_pairs) if valid_pairs is not None and len(valid_pairs) else None
    start = theta0 if theta_init is None else theta_init
    result = optimize(objective, start, settings, valid=valid, callback=callback, progress=progress,
                      label="full-space training")
    return replace(result, extras={**result.extras, "full_solves": solves.count, "matvecs": solves.iterations})
