"""fitrank's JAX settings take effect in a fresh process that imports fitrank before computing."""

from __future__ import annotations

import subprocess
import sys

# A program far above the CPU client's 1,000-flop line for running on the calling thread: with
# asynchronous dispatch the call returns before the (about 1 Gflop) product is done, with
# synchronous dispatch only after. is_ready() right after the call tells which.
_PROBE = """
import fitrank.reduced
import jax, jax.numpy as jnp
product = jax.jit(lambda a: jnp.sin(a @ a) @ a)
a = jnp.ones((800, 800))
product(a).block_until_ready()  # compiled before the probe
print(a.dtype, jax.config.read("jax_cpu_enable_async_dispatch"), product(a).is_ready())
"""


def test_importing_a_jax_module_of_fitrank_sets_float64_and_synchronous_dispatch():
    # a fresh interpreter: the test process's own settings come from conftest.py
    done = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, text=True, check=True)
    assert done.stdout.split() == ["float64", "False", "True"]
