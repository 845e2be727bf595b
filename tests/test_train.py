"""The training loop: recovery of a known theta, optimisers, stopping rules,
reproducibility, the full-space reference trainer, and the run plots."""

import math

import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from matplotlib import image

from _dense_scorer import dense_scorer, tiny_problem
from fitrank.errors import ConvergenceError, FitrankInputError
from fitrank.metrics import pair_accuracy
from fitrank.objective import Objective, ObjectiveSpec, calibrate, reduced_objective
from fitrank.plots import plot_singular_values, plot_training, plot_weights
from fitrank.train import HISTORY_COLUMNS, LoopSettings, optimize, train_full, train_reduced

TRUTHS = {"scale": (1.2, -0.8, 0.0), "mixture": (1.0, -1.0, 0.0), "features": (1.0, -0.6)}


@pytest.fixture(scope="module")
def problem():
    return tiny_problem(kind="scale", theta_true=TRUTHS["scale"])


@pytest.fixture(scope="module")
def objective(problem):
    train = problem.pairs.subset("train")
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    return reduced_objective(scorer, train, ObjectiveSpec("logistic", 0.1, 1e-3), n=problem.graph.n,
                             theta0=problem.weighting.theta0)


def _x(problem, theta):
    everywhere = dense_scorer(problem.graph, problem.weighting, np.arange(problem.graph.n))
    return np.asarray(everywhere.fn(jnp.asarray(theta), everywhere.arrays))


def _centred(kind, theta):
    # Mixture and scale walks ignore a constant added to theta; compare the centred vectors.
    theta = np.asarray(theta, dtype=float)
    return theta - theta.mean() if kind in ("scale", "mixture") else theta


@pytest.mark.slow
@pytest.mark.parametrize("kind", sorted(TRUTHS))
def test_reduced_training_recovers_a_known_theta(kind):
    # Ground truth recovery: pairs are labelled by exact PageRank at a known theta (5% flipped).
    # Sigmoid loss at a small temperature approximates the count of misordered pairs
    # (Yan et al., ICML 2003); a tenth of the calibrated scale, as the default rule picks.
    problem = tiny_problem(kind=kind, theta_true=TRUTHS[kind])
    graph, weighting = problem.graph, problem.weighting
    train, test = problem.pairs.subset("train"), problem.pairs.subset("test")
    theta0 = weighting.theta0
    spec = calibrate(ObjectiveSpec("sigmoid", None, 1e-3), _x(problem, theta0), train, n=graph.n)
    result = train_reduced(dense_scorer(graph, weighting, train.nodes()), train, spec, n=graph.n, theta0=theta0,
                           progress=False)
    assert result.stopped_because == "grad_tol"
    assert np.abs(_centred(kind, result.theta) - _centred(kind, problem.theta_true)).max() < 0.15
    truth_acc = pair_accuracy(problem.x_true, test)
    learned_acc = pair_accuracy(_x(problem, result.theta), test)
    start_acc = pair_accuracy(_x(problem, theta0), test)
    assert learned_acc >= truth_acc - 0.02
    assert learned_acc >= start_acc + 0.10


def test_adam_and_lbfgs_reach_the_same_minimum(problem, objective):
    lbfgs = optimize(objective, problem.weighting.theta0, LoopSettings(grad_tol=1e-9), progress=False)
    adam = optimize(objective, problem.weighting.theta0,
                    LoopSettings(optimizer="adam", learning_rate=0.2, max_steps=300, grad_tol=1e-9),
                    progress=False)
    assert lbfgs.stopped_because == "grad_tol"
    assert lbfgs.history[-1]["grad_norm"] <= 1e-9
    assert adam.stopped_because == "max_steps" and adam.steps == 300 and len(adam.history) == 301
    # Adding a constant to theta leaves the scale walk unchanged, so only the weak penalty
    # pins that direction and adam creeps along it: compare the centred parameters.
    assert np.abs(_centred("scale", adam.theta) - _centred("scale", lbfgs.theta)).max() < 0.01
    assert adam.history[-1]["loss"] == pytest.approx(lbfgs.history[-1]["loss"], rel=1e-4)
    assert adam.history[-1]["grad_norm"] < 1e-3 * adam.history[0]["grad_norm"]
    # The final loss of a converged run is the minimum of its history (lbfgs only descends).
    losses = [row["loss"] for row in lbfgs.history]
    assert all(b <= a + 1e-15 for a, b in zip(losses, losses[1:]))
    assert lbfgs.history[0]["loss"] > lbfgs.history[-1]["loss"]


def test_history_rows_and_timings(problem, objective):
    result = optimize(objective, problem.weighting.theta0, LoopSettings(optimizer="sgd", learning_rate=0.5,
                                                                       max_steps=4), progress=False)
    frame = result.history_frame()
    assert list(frame.columns) == list(HISTORY_COLUMNS)
    assert frame["step"].tolist() == [0, 1, 2, 3, 4]
    assert frame["valid_acc"].isna().all()  # no validation given
    assert np.all(np.diff(frame["seconds"]) >= 0)
    assert result.path.shape == (5, 3) and np.array_equal(result.path[-1], result.theta)
    assert result.per_step_seconds > 0 and result.seconds >= frame["seconds"].iloc[-1]
    assert result.extras["loss_param"] == 0.1
    assert math.isnan(result.best_valid_acc)


def test_early_stopping_keeps_the_best_theta(problem, objective):
    scores = iter([0.50, 0.60, 0.70, 0.65, 0.70, 0.60, 0.55, 0.55, 0.55, 0.55])

    def valid(theta):
        return next(scores)

    result = optimize(objective, problem.weighting.theta0,
                      LoopSettings(optimizer="adam", learning_rate=0.05, patience=3), valid=valid, progress=False)
    # best 0.70 first at step 2; step 4 ties it (kept: later), steps 5, 6, 7 do not improve on
    # step 2 -> patience 3 counts steps 3..5 since the last strict improvement: stop at step 5.
    assert result.stopped_because == "early_stop"
    assert result.steps == 5
    assert result.best_step == 4 and result.best_valid_acc == 0.70
    assert np.array_equal(result.theta, result.path[4])


def test_real_validation_drives_early_stopping(problem):
    train, valid = problem.pairs.subset("train"), problem.pairs.subset("valid")
    graph, weighting = problem.graph, problem.weighting
    result = train_reduced(dense_scorer(graph, weighting, train.nodes()), train,
                           ObjectiveSpec("logistic", 0.1, 1e-3), n=graph.n, theta0=weighting.theta0,
                           settings=LoopSettings(optimizer="sgd", learning_rate=0.02, max_steps=400, patience=5),
                           valid_pairs=valid, valid_scorer=dense_scorer(graph, weighting, valid.nodes()),
                           progress=False)
    accuracies = [row["valid_acc"] for row in result.history]
    assert result.stopped_because == "early_stop" and result.steps < 400
    assert result.best_valid_acc == max(accuracies)
    assert result.best_valid_acc == pytest.approx(pair_accuracy(_x(problem, result.theta), valid), abs=1e-12)
    assert result.best_valid_acc > accuracies[0]


def test_callback_and_stall_and_non_finite_stops(problem, objective):
    seen = []
    stopped = optimize(objective, problem.weighting.theta0, LoopSettings(optimizer="adam"),
                       callback=lambda row, theta: seen.append(row["step"]) or row["step"] == 2, progress=False)
    assert stopped.stopped_because == "callback" and seen == [0, 1, 2] and stopped.steps == 2

    def tiny_slope(theta, arrays):
        return jnp.asarray(1.0), jnp.full_like(theta, 1e-20)  # a step of 5e-22 cannot move theta = 1

    still = Objective(None, tiny_slope, {"weight": jnp.ones(1)}, np.ones(3), ObjectiveSpec("logistic", 1.0))
    result = optimize(still, np.ones(3), LoopSettings(optimizer="sgd", grad_tol=0.0), progress=False)
    assert result.stopped_because == "stalled" and result.steps == 0

    def broken(theta, arrays):
        bad = jnp.where(jnp.abs(theta).sum() > 0, jnp.nan, 1.0)
        return bad, jnp.ones_like(theta)

    nan_objective = Objective(None, broken, {"weight": jnp.ones(1)}, np.zeros(3), ObjectiveSpec("logistic", 1.0))
    result = optimize(nan_objective, np.zeros(3), LoopSettings(optimizer="sgd"), progress=False)
    assert result.stopped_because == "non_finite"
    assert result.steps == 1 and len(result.history) == 1
    assert np.array_equal(result.theta, np.zeros(3))  # the last finite iterate


def test_a_non_finite_start_stops_at_once_and_keeps_the_start():
    # e.g. data whose reduced objective is NaN at theta0: no finite iterate at all
    def nowhere_finite(theta, arrays):
        return jnp.asarray(jnp.nan), jnp.ones_like(theta)

    nan_objective = Objective(None, nowhere_finite, {"weight": jnp.ones(1)}, np.zeros(3),
                              ObjectiveSpec("logistic", 1.0))
    start = np.array([0.5, -1.0, 2.0])
    result = optimize(nan_objective, start, LoopSettings(optimizer="lbfgs"), progress=False)
    assert result.stopped_because == "non_finite" and result.steps == 0 and result.history == ()
    assert np.array_equal(result.theta, start)
    assert result.path.shape == (0, 3)


@pytest.mark.parametrize("optimizer", ["lbfgs", "adam"])
def test_an_error_inside_the_objective_is_raised_as_itself(optimizer):
    # L-BFGS reaches the objective through a host callback inside compiled code, where JAX would
    # turn any exception into its own INTERNAL error; the user must see the original one line.
    def failing(theta, arrays):
        raise ConvergenceError("adjoint solve", 10, 1.0, 2.0, 1e-12)

    objective = Objective(None, failing, {"weight": jnp.ones(1)}, np.zeros(2), ObjectiveSpec("logistic", 1.0))
    with pytest.raises(ConvergenceError, match="^adjoint solve did not converge"):
        optimize(objective, np.zeros(2), LoopSettings(optimizer=optimizer), progress=False)
    from fitrank import train
    assert not train._FAILURES and not train._OBJECTIVES  # nothing left behind for the next run


def test_same_seed_same_numbers(problem, objective):
    settings = LoopSettings(optimizer="adam", learning_rate=0.1, max_steps=15, batch_pairs=100, seed=7)
    first = optimize(objective, problem.weighting.theta0, settings, progress=False)
    second = optimize(objective, problem.weighting.theta0, settings, progress=False)
    other = optimize(objective, problem.weighting.theta0, LoopSettings(**{**settings.__dict__, "seed": 8}),
                     progress=False)
    assert [r["loss"] for r in first.history] == [r["loss"] for r in second.history]
    assert np.array_equal(first.theta, second.theta)
    assert [r["loss"] for r in first.history] != [r["loss"] for r in other.history]
    deterministic = [optimize(objective, problem.weighting.theta0, LoopSettings(max_steps=5), progress=False)
                     for _ in range(2)]
    assert np.array_equal(deterministic[0].path, deterministic[1].path)


@pytest.mark.slow
@pytest.mark.parametrize("optimizer", ["lbfgs", "adam"])
def test_full_space_training_matches_reduced_training_on_an_exact_scorer(problem, optimizer):
    # The dense scorer is exact, so both trainers minimise the same J: one through JAX
    # autodiff, the other through sparse solves and adjoint gradients.
    train, valid = problem.pairs.subset("train"), problem.pairs.subset("valid")
    graph, weighting = problem.graph, problem.weighting
    spec = ObjectiveSpec("logistic", 0.1, 1e-3)
    settings = LoopSettings(optimizer=optimizer, learning_rate=0.2, max_steps=40, grad_tol=1e-8)
    reduced = train_reduced(dense_scorer(graph, weighting, train.nodes()), train, spec, n=graph.n,
                            theta0=weighting.theta0, settings=settings, valid_pairs=valid,
                            valid_scorer=dense_scorer(graph, weighting, valid.nodes()), progress=False)
    full = train_full(graph, weighting, train, spec, settings=settings, valid_pairs=valid, tol=1e-13,
                      progress=False)
    assert full.stopped_because == reduced.stopped_because
    assert full.steps == reduced.steps
    assert full.theta == pytest.approx(reduced.theta, abs=1e-6)
    for a, b in zip(full.history, reduced.history):
        assert a["loss"] == pytest.approx(b["loss"], rel=1e-8)
        assert a["valid_acc"] == b["valid_acc"]
    assert full.extras["full_solves"] >= full.steps and full.extras["matvecs"] > 0


def test_bad_settings_are_refused(objective):
    for settings, message in [(LoopSettings(optimizer="newton"), "optimizer must be one of"),
                              (LoopSettings(learning_rate=0.0), "learning_rate"),
                              (LoopSettings(max_steps=-1), "max_steps"),
                              (LoopSettings(patience=-2), "patience"),
                              (LoopSettings(batch_pairs=10), "batch_pairs needs adam or sgd")]:
        with pytest.raises(FitrankInputError, match=message):
            optimize(objective, np.zeros(3), settings, progress=False)


def test_plots_write_readable_pngs(tmp_path, problem, objective):
    result = optimize(objective, problem.weighting.theta0, LoopSettings(max_steps=5),
                      valid=lambda theta: pair_accuracy(_x(problem, theta), problem.pairs.subset("valid")),
                      progress=False)
    files = [
        plot_training(result.history, tmp_path / "loss.png"),
        plot_training(result.history_frame(), tmp_path / "frame.png"),
        plot_training(pd.concat([result.history_frame().assign(round=r) for r in (0, 1)]), tmp_path / "rounds.png"),
        plot_weights(problem.weighting.param_names, result.theta, problem.weighting.theta0, tmp_path / "w.png",
                     truth=problem.theta_true),
        plot_singular_values(np.array([3.0, 1.0, 0.1, 1e-5, 0.0]), tmp_path / "sub" / "sv.png", rank=3),
    ]
    for path in files:
        with open(path, "rb") as handle:
            assert handle.read(8) == b"\x89PNG\r\n\x1a\n"
        pixels = image.imread(path)
        assert pixels.shape[0] > 200 and pixels.shape[1] > 300
        assert pixels.std() > 0.01  # something was drawn
    assert sorted(p.name for p in tmp_path.iterdir()) == ["frame.png", "loss.png", "rounds.png", "sub", "w.png"]
    with pytest.raises(ValueError, match="one value per name"):
        plot_weights(["a", "b"], np.zeros(3), np.zeros(2), tmp_path / "bad.png")


def test_a_ctrl_c_waiting_for_a_checkpoint_stops_training_at_the_next_step(problem, objective):
    from fitrank import interrupt

    from tests._ctrl_c import press_ctrl_c_inside

    steps = []
    with interrupt.handling_interrupts(), pytest.raises(KeyboardInterrupt):
        optimize(objective, problem.weighting.theta0, LoopSettings(optimizer="sgd", learning_rate=0.5),
                 callback=lambda row, theta: steps.append(row) or (press_ctrl_c_inside() if len(steps) == 2 else None),
                 progress=False)
    assert len(steps) == 2
