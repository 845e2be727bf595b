"""Pressing Ctrl-C from code that looks like a given module, as the tests of interrupt handling need."""

from __future__ import annotations

import signal


def press_ctrl_c_inside(module_name: str = "jax._src.stand_in") -> None:
    """Raise SIGINT from a frame whose module is ``module_name`` (by default one inside JAX, where it must wait)."""
    namespace = {"__name__": module_name, "signal": signal}
    exec("def press():\n    signal.raise_signal(signal.SIGINT)\n", namespace)
    namespace["press"]()
