"""Test-wide set-up: fitrank's JAX settings on the CPU, and a Hypothesis profile sized for CI.

fitrank's JAX settings (float64, synchronous dispatch) must be in place before
any test module builds a JAX array, so they are applied here, at import time,
before pytest collects anything.
"""

import os

os.environ.setdefault("JAX_PLATFORMS", "cpu")
# The CLI keeps compiled programs on disk; in-process CLI tests must not switch that on
# for the whole suite (tests/test_cli.py checks the cache in subprocesses of its own).
os.environ.setdefault("FITRANK_COMPILE_CACHE", "off")

from fitrank.jax_settings import apply_jax_settings  # noqa: E402

apply_jax_settings()

from hypothesis import HealthCheck, settings  # noqa: E402

# "ci" (the default): derandomised so a run is repeatable, no deadline (JIT
# compilation makes first calls slow), few examples to keep the suite short.
settings.register_profile(
    "ci", deadline=None, max_examples=30, derandomize=True, suppress_health_check=[HealthCheck.too_slow]
)
# "thorough": for a local hunt, FITRANK_HYPOTHESIS_PROFILE=thorough make test
settings.register_profile("thorough", deadline=None, max_examples=500)
settings.load_profile(os.environ.get("FITRANK_HYPOTHESIS_PROFILE", "ci"))
