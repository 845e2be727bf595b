"""The JAX settings fitrank relies on, applied on import by the lowest modules that run JAX code
(weightings.py, losses.py); every other module that runs JAX code imports one of them.

* **64-bit floats** (``jax_enable_x64``): PageRank scores of a large graph
  differ in their seventh digit, and a line search near the optimum compares
  objective values closer than float32 can tell apart.
* **Synchronous CPU dispatch** (``jax_cpu_enable_async_dispatch = False``).
  By default XLA's CPU client hands every program above 1,000 estimated flops
  to a worker thread and the caller waits for it. fitrank's online programs
  are a few tens of microseconds each and the caller always waits for the
  answer, so the hand-off is pure cost, and the worker often runs on the
  other core, whose cache does not hold the model's arrays. Run on the
  calling thread, the interpolation models' evaluations took 0.39-0.77 of
  their time (200k-node benchmark graph, k = 40-50, medians of alternating
  processes on the 2-core development machine; ``experiments/README.md``).

The dispatch setting is read when JAX creates its CPU client, at the first
computation of the process: a program that ran JAX code before importing
fitrank's modules keeps asynchronous dispatch (results are the same, only
slower). Both are process-wide, as JAX's settings are.
"""

from __future__ import annotations

import jax


def apply_jax_settings() -> None:
    """Set fitrank's JAX settings (idempotent)."""
    jax.config.update("jax_enable_x64", True)
    jax.config.update("jax_cpu_enable_async_dispatch", False)
