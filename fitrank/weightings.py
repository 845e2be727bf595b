"""Weightings: how a parameter vector theta turns a graph into a random walk.

Every weighting reduces to two pieces that the solvers share:

* per-edge transition probabilities ``p_e = P(theta)[dst_e, src_e]``, with the
  columns of P summing to at most 1;
* the *leak* of each node, ``leak_j = 1 - sum_i P_ij``: the probability mass
  that leaves node j through no edge (all of it for a dangling node), which the
  dangling policy sends to the teleport vector (or back to j). The leak is
  always ``leak = Z @ c(theta)`` for a fixed 0/1 matrix Z (n, L) and a few
  coefficients c, so reduced models can precompute ``Z^T U``.

The three weightings of DESIGN.md section 2:

=================  ==========================================  ===================
relation mixture   P = sum_t w_t P_t, w = softmax(theta)        affine in w
relation scale     a_e = b_e exp(theta_rel(e)), p_e = a_e/d_j   closed-form d_j
feature log-linear a_e = b_e exp(theta . phi_e), p_e = a_e/d_j  needs all out-edges
=================  ==========================================  ===================

``transition(theta, tables)`` is a pure JAX function of ``theta`` and a dict of
arrays; it runs on the whole graph (``weighting.tables``) or on the few edges a
reduced model needs (``weighting.local_tables(edge_ids)``), which is what makes
interpolation rows cheap.
"""

from __future__ import annotations

import dataclasses
import warnings
from dataclasses import dataclass, field
from typing import Callable

import jax
import jax.numpy as jnp
import numpy as np
from scipy.stats import qmc

from fitrank import native
from fitrank.errors import FitrankInputError
from fitrank.graph import Graph
from fitrank.jax_settings import apply_jax_settings

apply_jax_settings()

KINDS = ("mixture", "scale", "features")


@dataclass(frozen=True, eq=False)
class Weighting:
    """A parameterised random walk on one graph.

    Attributes:
      kind: ``"mixture"``, ``"scale"`` or ``"features"``.
      param_names: readable names of the p parameters (``mix:<relation>``,
        ``scale:<relation>``, ``feat:<feature>``).
      theta0: (p,) default parameters (the untrained walk; regularisation target).
      lower, upper: (p,) the box in theta-space that offline sampling covers
        (for the mixture, sampling covers the simplex of w instead).
      affine: True when M(theta) = sum_k w_k(theta) M_k with fixed M_k
        (Galerkin reduction is exact then); see :func:`affine_terms`.
      closed_form_out_weight: True when a node's out-weight follows from a
        few per-node sums, so a row of P needs only that row's in-edges.
      tables: dict of arrays that :attr:`transition` reads for the full graph.
      leak_basis: (n, L) float64 0/1 matrix Z with leak = Z @ leak_coefficients(theta).
      transition: ``(theta (p,), tables, xp=jax.numpy) -> p (E_sub,)``, pure and
        differentiable in JAX; with ``xp=numpy`` the same formula in NumPy (a
        single full solve then needs no JAX compile).
      leak_coefficients: ``(theta (p,), xp=jax.numpy) -> c (L,)``, likewise.
      coefficients: ``theta (p,) -> w (K,)`` the affine coefficients
        (mixture: softmax(theta)); None when not affine.
      local_tables: ``edge_ids (E_sub,) -> tables`` restricted to those edges
        (and, for the feature weighting, the out-edges of their sources).
      feature_center, feature_scale: (f,) the standardisation applied to raw
        features (feature weighting; empty otherwise).
      options: the keyword options it was built with; ``make_weighting(kind,
        graph, **options)`` rebuilds it (how worker processes get it).
      table_fill: ``{table name: value}`` that makes a padded entry of
        ``local_tables`` inert: a padded edge gets a finite p and leaves every
        real edge's p unchanged. Regional models pad their regions' tables to
        one shape with it (:mod:`fitrank.regions`).
    """

    kind: str
    param_names: tuple[str, ...]
    theta0: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    affine: bool
    closed_form_out_weight: bool
    tables: dict
    leak_basis: np.ndarray
    transition: Callable
    leak_coefficients: Callable
    coefficients: Callable | None
    local_tables: Callable
    feature_center: np.ndarray = field(default_factory=lambda: np.zeros(0))
    feature_scale: np.ndarray = field(default_factory=lambda: np.zeros(0))
    options: dict = field(default_factory=dict)
    table_fill: dict = field(default_factory=dict)

    @property
    def num_params(self) -> int:
        return len(self.param_names)

    def sample(self, m: int, seed: int = 0) -> np.ndarray:
        """Quasi-random parameter points covering this weighting's domain.

        Box domains use a scrambled Sobol sequence; the mixture maps Sobol points
        to the simplex through exponential spacings (uniform Dirichlet(1) for
        random points) and returns centred log-weights.

        Args:
          m: number of points.
          seed: seed of the scrambling.

        Returns:
          (m, p) float64 theta values.

        References:
          Sobol, USSR Comput. Math. Math. Phys. 7(4), 1967; the spacing map:
          Devroye, "Non-Uniform Random Variate Generation", 1986, ch. V.2.
        """
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # Sobol balance note for m not 2^k
            u = qmc.Sobol(d=self.num_params, scramble=True, seed=seed).random(m)
        if self.kind == "mixture":
            spacings = -np.log(np.clip(1.0 - u, 1e-12, 1.0))
            w = spacings / spacings.sum(axis=1, keepdims=True)
            logw = np.log(np.maximum(w, 1e-9))
            return logw - logw.mean(axis=1, keepdims=True)
        return self.lower + u * (self.upper - self.lower)

    def coordinates(self, theta, xp=np):
        """Where theta sits in the sampled domain, in that domain's own units.

        Distances between these coordinates say which parameter points give
        similar walks, which is what grouping points into regions needs. The
        mixture: its weights softmax(theta), on the simplex it samples. The
        scale weighting: theta less its mean (a common shift leaves the walk
        unchanged) over the box width. The feature weighting: theta over the box
        width.

        Args:
          theta: (..., p) parameters.
          xp: ``numpy`` or ``jax.numpy``.

        Returns:
          (..., p) coordinates.
        """
        if self.kind == "mixture":
            return _softmax(xp.asarray(theta), xp)
        if self.kind == "scale":
            theta = theta - theta.mean(axis=-1, keepdims=True)
        return theta / (self.upper - self.lower)

    def named(self, theta) -> dict[str, float]:
        """``{parameter name: value}`` for a (p,) theta."""
        return {name: float(value) for name, value in zip(self.param_names, np.asarray(theta))}


def make_weighting(kind: str, graph: Graph, **options) -> Weighting:
    """The weighting called ``kind`` ("mixture", "scale" or "features") on ``graph``."""
    builders = {"mixture": relation_mixture, "scale": relation_scale, "features": feature_loglinear}
    if kind not in builders:
        raise FitrankInputError(f"unknown weighting '{kind}'; choose one of {', '.join(KINDS)}")
    return dataclasses.replace(builders[kind](graph, **options), options=dict(options))


def _relation_labels(graph: Graph) -> list[str]:
    return [name if name != "" else "edge" for name in graph.relation_names]


def _sources_of(graph: Graph, edge_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct sources J of the given edges and each edge's slot in J."""
    sources, slot = np.unique(graph.src[edge_ids], return_inverse=True)
    return sources, slot.astype(np.int64)


# --------------------------------------------------------------------------- mixture


def relation_mixture(graph: Graph) -> Weighting:
    """Relation mixture: P(w) = sum_t w_t P_t with w = softmax(theta).

    P_t is the walk on relation t alone, its columns normalised by the node's
    relation-t out-weight; a node with no out-edge of relation t leaks w_t
    (which the dangling policy routes). M(w) is affine in w.
    """
    out_weight = graph.relation_out_weight()  # (n, T)
    unit = graph.base / out_weight[graph.src, graph.relation]  # p_e of P_rel(e)
    lacks = (out_weight <= 0).astype(np.float64)  # (n, T): node lacks relation t

    def local_tables(edge_ids):
        edge_ids = np.asarray(edge_ids, dtype=np.int64)
        return {"rel": graph.relation[edge_ids], "unit": unit[edge_ids]}

    num_rel = graph.num_relations
    return Weighting(
        kind="mixture",
        param_names=tuple(f"mix:{label}" for label in _relation_labels(graph)),
        theta0=np.zeros(num_rel),
        lower=np.full(num_rel, -np.inf),
        upper=np.full(num_rel, np.inf),
        affine=True,
        closed_form_out_weight=True,
        tables=local_tables(np.arange(graph.num_edges)),
        leak_basis=lacks,
        transition=_mixture_transition,
        leak_coefficients=_softmax,
        coefficients=jax.nn.softmax,
        local_tables=local_tables,
        table_fill={"rel": 0, "unit": 0.0},
    )


def affine_terms(graph: Graph, weighting: Weighting) -> list[np.ndarray]:
    """The fixed per-edge transition data of an affine weighting.

    Returns:
      K arrays of shape (E,): ``P(theta) = sum_k coefficients(theta)[k] * matrix(terms[k])``
      and ``leak(theta) = sum_k coefficients(theta)[k] * leak_basis[:, k]``.
    """
    if not weighting.affine:
        raise FitrankInputError(f"the {weighting.kind} weighting is not affine in its parameters")
    unit = np.asarray(weighting.tables["unit"])
    rel = np.asarray(weighting.tables["rel"])
    return [np.where(rel == t, unit, 0.0) for t in range(graph.num_relations)]


# --------------------------------------------------------------------------- scale


def relation_scale(graph: Graph, bound: float = 1.5) -> Weighting:
    """Relation scale: a_e = b_e exp(theta_rel(e)), p_e = a_e / d_src(e).

    The out-weight d_j = sum_t exp(theta_t) S[j, t] has a closed form from the
    per-node, per-relation sums S, so a row needs only its in-edges and S of
    their sources. Adding a constant to theta changes nothing (the walk
    normalises it away); regularisation towards theta0 pins it.

    Args:
      graph: the graph.
      bound: sampling box is [-bound, bound]^T: relation weights within a factor
        e^(2 bound) (about 20 by default) of each other. As for any box, a wider
        one needs a larger basis for the same accuracy (measured on a generated
        20k-node graph with 4 relations, k = 100: half-width 2.5 gives top-100
        Kendall tau 0.996 even for the best approximation in the basis, 1.5
        gives 0.999); training may leave the box and enrichment follows it.
    """
    # Each node's weights divided by its largest per-relation sum: p_e is unchanged, and
    # every number is O(1), so tiny base weights (even subnormal ones) cannot underflow
    # to a 0 / 0 once scaled by exp(theta - max theta).
    out_weight = graph.relation_out_weight()
    largest = out_weight.max(axis=1)
    largest = np.where(largest > 0, largest, 1.0)
    out_weight = out_weight / largest[:, None]
    base = graph.base / largest[graph.src]

    def local_tables(edge_ids):
        edge_ids = np.asarray(edge_ids, dtype=np.int64)
        sources, slot = _sources_of(graph, edge_ids)
        return {
            "rel": graph.relation[edge_ids],
            "base": base[edge_ids],
            "slot": slot,
            "out_weight": out_weight[sources],
        }

    num_rel = graph.num_relations
    full = {"rel": graph.relation, "base": base, "slot": graph.src, "out_weight": out_weight}
    return Weighting(
        kind="scale",
        param_names=tuple(f"scale:{label}" for label in _relation_labels(graph)),
        theta0=np.zeros(num_rel),
        lower=np.full(num_rel, -bound),
        upper=np.full(num_rel, bound),
        affine=False,
        closed_form_out_weight=True,
        tables=full,
        leak_basis=_dangling_basis(graph),
        transition=_scale_transition,
        leak_coefficients=_one_coefficient,
        coefficients=None,
        local_tables=local_tables,
        # a padded edge has base weight 0 (so p = 0); a padded source's out-weights are 1, never 0 / 0
        table_fill={"rel": 0, "base": 0.0, "slot": 0, "out_weight": 1.0},
    )


def _dangling_basis(graph: Graph) -> np.ndarray:
    return (graph.out_degree() == 0).astype(np.float64)[:, None]


def _one_coefficient(theta, xp=jnp):
    return xp.ones(1, dtype=theta.dtype)


# --------------------------------------------------------------------------- features


def feature_loglinear(graph: Graph, bound: float | None = None) -> Weighting:
    """Feature log-linear: a_e = b_e exp(theta . phi_e), p_e = a_e / d_src(e).

    Features are standardised over edges (mean 0, standard deviation 1; a
    constant column is only centred) so that one unit of theta means the same
    for every feature. The out-weight of j needs every out-edge of j; it is
    computed as a log-sum-exp per source for stability with large features.

    Args:
      graph: the graph; needs at least one feature column.
      bound: sampling box is [-bound, bound]^f; default 0.7 / sqrt(f), so that
        for uncorrelated standardised features the combined log-weight
        theta . phi has standard deviation at most 0.7 across the box. The box
        only sets where the reduced model is built: a wider box needs a larger
        basis for the same accuracy (measured: at f = 4, k = 100, half-width 0.5
        gives top-100 Kendall tau 0.998, 0.35 gives 0.999). Training may leave
        the box; the full check with enrichment follows it there.
    """
    if graph.features.shape[1] == 0:
        raise FitrankInputError("the features weighting needs numeric edge feature columns; the edge table has none")
    center, spread, standard = _standardise(graph.features)
    shifted = _per_source_shifted(np.log(graph.base), standard, graph.src, graph.n)

    def local_tables(edge_ids):
        edge_ids = np.asarray(edge_ids, dtype=np.int64)
        sources = np.unique(graph.src[edge_ids])
        out_ids, out_slot = graph.out_edges_of(sources)  # all out-edges of the sources, grouped by source
        lookup = np.full(graph.num_edges, -1, dtype=np.int64)
        lookup[out_ids] = np.arange(out_ids.size)
        target = lookup[edge_ids]
        local = {
            **{name: values[..., out_ids] for name, values in shifted.items()},
            "slot": out_slot,
            "has_out": np.ones(sources.size, dtype=bool),
            "target": target,
            "target_slot": out_slot[target],
        }
        # the same columns as one array, the native kernel's one operand (fitrank.native.feature_weights)
        local["packed"] = np.vstack([local["log_base"], local["feat_hi"], local["feat_lo"], out_slot.astype(np.float64)])
        return local

    f = standard.shape[1]
    bound = 0.7 / np.sqrt(f) if bound is None else float(bound)
    full = {**shifted, "slot": graph.src, "has_out": graph.out_degree() > 0}
    return Weighting(
        kind="features",
        param_names=tuple(f"feat:{name}" for name in graph.feature_names),
        theta0=np.zeros(f),
        lower=np.full(f, -bound),
        upper=np.full(f, bound),
        affine=False,
        closed_form_out_weight=False,
        tables=full,
        leak_basis=_dangling_basis(graph),
        transition=_feature_transition,
        leak_coefficients=_one_coefficient,
        coefficients=None,
        local_tables=local_tables,
        feature_center=center,
        feature_scale=spread,
        # a padded out-edge has weight exp(-inf) = 0 and normalises nothing; a padded source has no
        # out-edge; a padded in-edge reads the first real out-edge (finite, and never used)
        table_fill={"log_base": -np.inf, "feat_hi": 0.0, "feat_lo": 0.0, "slot": 0, "has_out": False,
                    "target": 0, "target_slot": 0, "packed": np.concatenate([[-np.inf], np.zeros(2 * f + 1)])},
    )


def _standardise(features: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-column (center, spread, standardised features) of ``features`` (E, f).

    Nothing overflows whatever the units (values near 1e308 are finite, their
    sum is not; at 1e200 the variance is not): the mean is taken of the column
    divided by its largest magnitude, and the deviations from it are formed in
    the column's own units, a quarter at a time, then scaled by their own
    largest magnitude. Formed that way a deviation is exact for values close
    to the mean, so a small spread on a large offset keeps all its digits;
    formed from the scaled column it keeps only those the offset leaves (on
    20,000 values of 1e9 plus noise, 5e-4 off at unit spread with noise of
    0.01 and 3.6 off with noise of 1e-4, against 1e-14 now). A second pass
    removes the rounding left in the mean.

    A constant column becomes exactly 0, so its parameter has no effect at
    all. Constant means a spread within ``CONSTANT_SPREAD`` of the column's
    largest magnitude: values that differ by rounding only (one merged from
    rows of different weight, say) are not a feature, and standardising them
    would blow their rounding up to unit spread.

    References:
      Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002,
      sec. 1.9 and 2.5 (the two-pass variance; Sterbenz: the difference of
      floats within a factor 2 of each other is exact).
    """
    magnitude = np.abs(features).max(axis=0)
    magnitude = np.where(magnitude > 0, magnitude, 1.0)
    center = (features / magnitude).mean(axis=0) * magnitude
    deviation = features * 0.25 - center * 0.25  # a quarter each: opposite signs near 1e308 stay finite
    reach = np.abs(deviation).max(axis=0)
    reach = np.where(reach > 0, reach, 1.0)
    scaled = deviation / reach
    rounding = scaled.mean(axis=0)  # what the first pass left of the mean
    scaled = scaled - rounding
    center = center + rounding * (4.0 * reach)
    scaled_spread = scaled.std(axis=0)
    relative_spread = scaled_spread * (4.0 * reach / magnitude)  # the spread over the largest magnitude
    varies = relative_spread > CONSTANT_SPREAD
    constant = relative_spread <= CONSTANT_SPREAD  # not ~varies: a NaN spread must carry its NaN on, to be refused
    standard = np.where(constant, 0.0, scaled / np.where(varies, scaled_spread, 1.0))
    return center, np.where(varies, relative_spread * magnitude, 1.0), standard


CONSTANT_SPREAD = 64 * np.finfo(np.float64).eps
"""Largest standard deviation, relative to a column's largest magnitude, that is rounding and not a feature.

Common practice (scikit-learn's scaler likewise treats a variance within a
rounding bound as zero; recalled from memory): a few dozen units in the last
place (1.4e-14) is far above the rounding of stored or averaged values and
far below any real variation of a measured feature.
"""


# Transitions are module-level functions of (theta, tables) only, so one jit-compiled
# program serves every weighting of the same kind and table shapes. Each is one formula
# for two array modules: JAX (jit, gradients) and NumPy (a single full solve, where a
# first JAX compile would cost more than the whole evaluation); only the steps JAX
# spells differently branch on ``xp``.


def _softmax(theta, xp=jnp):
    return jax.nn.softmax(theta) if xp is jnp else _softmax_rows(theta)


def _softmax_rows(theta: np.ndarray) -> np.ndarray:
    shifted = np.exp(theta - theta.max(axis=-1, keepdims=True))
    return shifted / shifted.sum(axis=-1, keepdims=True)


def _constant(value, xp):
    """value, held constant under differentiation (the shift that keeps exp from overflowing)."""
    return jax.lax.stop_gradient(value) if xp is jnp else value


def _segment_max(values, segments, num, xp):
    if xp is jnp:
        return jax.ops.segment_max(values, segments, num_segments=num)
    peak = np.full(num, -np.inf)
    np.maximum.at(peak, segments, values)
    return peak


def _segment_sum(values, segments, num, xp):
    if xp is jnp:
        return jax.ops.segment_sum(values, segments, num_segments=num)
    return np.bincount(segments, weights=values, minlength=num)


def _mixture_transition(theta, tables, xp=jnp):
    return _softmax(theta, xp)[tables["rel"]] * tables["unit"]


def _scale_transition(theta, tables, xp=jnp):
    # Every source with out-edges has a relation of out-weight 1 (the rows are scaled so), so its
    # out-weight is at least the smallest scale: while that is >= _SMALLEST_TOTAL (a spread of
    # theta up to 322) neither the total nor its square in the derivative underflows.
    fits = xp.min(theta) - xp.max(theta) >= np.log(_SMALLEST_TOTAL)
    if xp is jnp:
        return jax.lax.cond(fits, _scale_transition_shared, _scale_transition_per_source, theta, tables)
    return (_scale_transition_shared if fits else _scale_transition_per_source)(theta, tables, xp)


def _scale_transition_shared(theta, tables, xp=jnp):
    """p with theta shifted by its maximum, one shift for every source (cheap: R exps)."""
    scale = xp.exp(theta - _constant(xp.max(theta), xp))
    out = tables["out_weight"] @ scale
    return tables["base"] * scale[tables["rel"]] / out[tables["slot"]]


def _scale_transition_per_source(theta, tables, xp=jnp):
    """p with theta shifted by the largest theta among each source's relations: for spreads so wide
    that one shared shift underflows a source's out-weight (S R exps)."""
    present = tables["out_weight"] > 0
    peak = xp.max(xp.where(present, theta[None, :], -np.inf), axis=1)
    peak = _constant(xp.where(present.any(axis=1), peak, 0.0), xp)
    # absent relations get exponent -inf, not theta - peak: exp of that may overflow, and even
    # masked afterwards its infinite derivative would turn the gradient into NaN
    scale = xp.exp(xp.where(present, theta[None, :] - peak[:, None], -np.inf))
    out = xp.sum(tables["out_weight"] * scale, axis=1)
    slot = tables["slot"]
    return tables["base"] * xp.exp(theta[tables["rel"]] - peak[slot]) / out[slot]


def _per_source_shifted(log_base: np.ndarray, standard: np.ndarray, src: np.ndarray, n: int) -> dict:
    """The feature weighting's tables: log-weights and features less per-source extremes.

    With l_e = log b_e - max_{e' out of j} log b_e', h_ef = phi_ef - max_j phi_f and
    g_ef = phi_ef - min_j phi_f (j the source of e), the score
    s_e(theta) = l_e + sum_f theta_f (h_ef if theta_f > 0 else g_ef)
    is log b_e + theta . phi_e less an upper bound of its source's largest
    score: exp(s_e) never overflows, and no per-source maximum is needed online
    (a scatter-max was a third of the local transition's time). Shifts per
    source cancel in the normalisation, exactly (the derivative too).

    Args:
      log_base: (E,) log base weights.
      standard: (E, f) standardised features.
      src: (E,) sources.
      n: node count.

    Returns:
      ``{"log_base": (E,), "feat_hi": (f, E), "feat_lo": (f, E)}`` (stored (f, E):
      one row per feature reads contiguously).
    """
    def extreme(values, pick, start):
        out = np.full(n, start)
        pick.at(out, src, values)
        return out[src]

    features = np.ascontiguousarray(standard.T)
    return {
        "log_base": log_base - extreme(log_base, np.maximum, -np.inf),
        "feat_hi": np.stack([row - extreme(row, np.maximum, -np.inf) for row in features]),
        "feat_lo": np.stack([row - extreme(row, np.minimum, np.inf) for row in features]),
    }


# below this, a source's shifted total is too small: the bound was too loose. Not only its digits
# (subnormals below 1e-308) but its derivative: JAX's quotient rule divides by the total squared,
# which underflowed to 0 for totals near 1e-290 and made the gradient NaN at theta far out
_SMALLEST_TOTAL = 1e-140


def _feature_transition(theta, tables, xp=jnp):
    if xp is jnp and "packed" in tables and jnp.result_type(theta) == jnp.float64 and native.available():
        # local tables: 0.4-0.5 of XLA's time for this step (exp one value at a time, then a scatter)
        return _native_feature_weights(theta, tables)[tables["target"]]
    score = tables["log_base"]
    for f in range(tables["feat_hi"].shape[0]):  # a few fused row updates; XLA's (f,) @ (f, E) dot was slower
        score = score + theta[f] * xp.where(theta[f] > 0, tables["feat_hi"][f], tables["feat_lo"][f])
    weight = xp.exp(score)
    slot, num = tables["slot"], tables["has_out"].shape[0]
    total = _segment_sum(weight, slot, num, xp)
    # a node without out-edges has total 0 and needs no normalising
    fits = xp.min(xp.where(tables["has_out"], total, xp.inf)) >= _SMALLEST_TOTAL if num else True
    if xp is jnp:
        return jax.lax.cond(fits, _normalised_weights, _feature_transition_rescaled, weight, total, score, tables)
    return (_normalised_weights if fits else _feature_transition_rescaled)(weight, total, score, tables, xp)


@jax.custom_jvp
def _native_feature_weights(theta, tables):
    """q (E,): every table edge's weight over its source's total, by the native kernel.

    The tables are constants (the weighting's data): only theta has a derivative.
    """
    packed = tables["packed"]
    if packed.ndim == 2:
        packed, part = packed[None], 0
    else:  # a regional model's stacked tables, whole, and its region (fitrank.regions)
        part = tables["part"]
    return native.feature_weights(theta, packed, part, tables["has_out"].shape[0])


@_native_feature_weights.defjvp
def _native_feature_weights_jvp(primals, tangents):
    """dq_e = q_e (ds_e - sum_{e' out of j} q_e' ds_e'), ds_e = dtheta . phi_e (j the source of e).

    The tables' features are shifted per source (``feat_hi`` and ``feat_lo``
    differ by a constant per source), and such shifts cancel in the
    difference: ``feat_hi`` serves for every sign of theta.
    """
    theta, tables = primals
    d_theta, _ = tangents
    weights = _native_feature_weights(theta, tables)
    d_score = d_theta @ tables["feat_hi"]
    mean = jax.ops.segment_sum(weights * d_score, tables["slot"], num_segments=tables["has_out"].shape[0])
    return weights, weights * (d_score - mean[tables["slot"]])


def _normalised_weights(weight, total, score, tables, xp=jnp):
    """p from exp(score) and the per-source totals."""
    slot = tables["slot"]
    if "target" not in tables:
        return weight / total[slot]
    # local tables: the out-edges only normalise; p is needed on the rows' in-edges alone
    return weight[tables["target"]] / total[tables["target_slot"]]


def _feature_transition_rescaled(weight, total, score, tables, xp=jnp):
    """p with each source's scores shifted by their maximum: for theta so far out that the bound underflows."""
    slot, num = tables["slot"], tables["has_out"].shape[0]
    score = score - _constant(_segment_max(score, slot, num, xp), xp)[slot]
    weight = xp.exp(score)
    return _normalised_weights(weight, _segment_sum(weight, slot, num, xp), score, tables, xp)


def inert_parameters(weighting: Weighting, theta, step: float = 1e-3) -> list[str]:
    """Names of the parameters whose change leaves the walk as it is around ``theta`` (p,).

    A parameter is inert when every node weighs all its out-edges by it alike:
    a relation scale whose relation is the only one its sources use, a feature
    that is constant among each node's out-edges. The normalisation then
    cancels it, the pairs cannot inform it, and training leaves it at theta0.
    Found by a central difference of the transition and leak per parameter;
    changes at the level of rounding (1e-10 of the largest p) count as none.

    Returns:
      the inert parameters' names, in ``param_names`` order.
    """
    theta = np.asarray(theta, dtype=np.float64)
    largest = max(float(np.abs(weighting.transition(theta, weighting.tables, xp=np)).max(initial=0.0)), 1e-300)
    inert = []
    for index, name in enumerate(weighting.param_names):
        shift = np.zeros_like(theta)
        shift[index] = step
        moved = [(weighting.transition(at, weighting.tables, xp=np), weighting.leak_coefficients(at, xp=np))
                 for at in (theta + shift, theta - shift)]
        walk_change = np.abs(moved[0][0] - moved[1][0]).max(initial=0.0)
        leak_change = np.abs(np.asarray(moved[0][1]) - np.asarray(moved[1][1])).max(initial=0.0)
        if walk_change <= 1e-10 * largest and leak_change <= 1e-10:
            inert.append(name)
    return inert


def row_cost(graph: Graph, weighting: Weighting) -> np.ndarray:
    """(n,) edges read to form row i of P(theta) on its own.

    With a closed-form out-weight a row needs its in-edges; otherwise also every
    out-edge of every in-neighbour (counted once per distinct in-neighbour).
    """
    in_degree = graph.in_degree().astype(np.int64)
    if weighting.closed_form_out_weight:
        return in_degree
    pair_key = np.unique(graph.dst * graph.n + graph.src)  # distinct (target, source) pairs
    rows, cols = pair_key // graph.n, pair_key % graph.n
    out_degree = graph.out_degree()
    return np.bincount(rows, weights=out_degree[cols], minlength=graph.n).astype(np.int64)
