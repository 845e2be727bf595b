"""Pair losses: hand values, numerical stability and derivatives against finite differences."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import assume, given
from hypothesis import strategies as st

from fitrank.losses import LOSSES, get_loss, logistic_loss, sigmoid_loss, squared_hinge_loss


def test_hand_values():
    # sigmoid: 1/(1+e^0) = 1/2; at z = beta ln 3: 1/(1 + 1/3) = 3/4
    assert float(sigmoid_loss(jnp.array(0.0), 0.7)) == 0.5
    assert float(sigmoid_loss(jnp.array(0.7 * math.log(3.0)), 0.7)) == pytest.approx(0.75, abs=1e-15)
    # logistic: log(1 + e^0) = ln 2; at z = beta ln 3: log 4
    assert float(logistic_loss(jnp.array(0.0), 2.0)) == pytest.approx(math.log(2.0), abs=1e-15)
    assert float(logistic_loss(jnp.array(2.0 * math.log(3.0)), 2.0)) == pytest.approx(math.log(4.0), abs=1e-15)
    # squared hinge: satisfied beyond the margin -> 0; (0.5 + 1)^2 = 2.25
    assert float(squared_hinge_loss(jnp.array(-2.0), 1.0)) == 0.0
    assert float(squared_hinge_loss(jnp.array(0.5), 1.0)) == 2.25
    assert float(squared_hinge_loss(jnp.array(0.3), 0.0)) == pytest.approx(0.09, abs=1e-15)


def test_logistic_is_stable_far_out():
    z = jnp.array([-800.0, 800.0])
    values = np.asarray(logistic_loss(z, 1.0))
    assert np.all(np.isfinite(values))
    assert values[0] == pytest.approx(0.0, abs=1e-300)
    assert values[1] == pytest.approx(800.0, rel=1e-15)  # log(1 + e^800) = 800 + log(1 + e^-800)
    grads = np.asarray(jax.vmap(jax.grad(logistic_loss), in_axes=(0, None))(z, 1.0))
    assert grads == pytest.approx([0.0, 1.0], abs=1e-300)


def test_logistic_agrees_with_jax_softplus_in_value_and_slope():
    # Reference: jax.nn.softplus and jax.nn.sigmoid (the library's own implementations).
    z = jnp.concatenate([jnp.linspace(-50.0, 50.0, 1001), jnp.array([-1e-12, 0.0, 1e-12, -700.0, 700.0])])
    np.testing.assert_allclose(logistic_loss(z, 1.0), jax.nn.softplus(z), rtol=1e-15, atol=1e-300)
    slopes = jax.vmap(jax.grad(logistic_loss), in_axes=(0, None))(z, 1.0)
    np.testing.assert_allclose(slopes, jax.nn.sigmoid(z), rtol=1e-15, atol=1e-300)


@pytest.mark.parametrize("name", sorted(LOSSES))
@given(z=st.floats(-4.0, 4.0), param=st.floats(0.2, 3.0))
def test_derivative_matches_central_differences(name, z, param):
    loss = get_loss(name)
    # Away from the kink of max(0, .), where a difference quotient would straddle it.
    assume(name != "squared_hinge" or abs(z + param) > 1e-3)
    h = 1e-6
    f = lambda t: float(loss.fn(jnp.array(t), param))  # noqa: E731
    # Central difference, error O(h^2 f''') (common practice).
    numeric = (f(z + h) - f(z - h)) / (2 * h)
    exact = float(jax.grad(loss.fn)(jnp.array(z), param))
    assert exact == pytest.approx(numeric, rel=1e-6, abs=1e-8)


@pytest.mark.parametrize("name", sorted(LOSSES))
def test_losses_grow_with_the_margin(name):
    z = jnp.linspace(-3.0, 3.0, 61)
    values = np.asarray(get_loss(name).fn(z, 0.5))
    assert np.all(np.diff(values) >= 0)
    assert values[-1] > values[0]


def test_registry_and_parameter_checks():
    assert set(LOSSES) == {"sigmoid", "logistic", "squared_hinge"}
    with pytest.raises(ValueError, match="unknown loss 'hinge'"):
        get_loss("hinge")
    assert get_loss("logistic").check_param(2) == 2.0
    assert get_loss("squared_hinge").check_param(0.0) == 0.0
    with pytest.raises(ValueError, match="temperature > 0"):
        get_loss("sigmoid").check_param(0.0)
    with pytest.raises(ValueError, match="margin >= 0"):
        get_loss("squared_hinge").check_param(-1.0)
    with pytest.raises(ValueError):
        get_loss("logistic").check_param(float("inf"))
