"""Ctrl-C: raised at once in plain code, held back inside JAX and gc callbacks until a checkpoint."""

from __future__ import annotations

import gc
import signal

import pytest

from fitrank import interrupt


def _run_inside(module_name: str):
    namespace = {"__name__": module_name, "signal": signal}
    exec("def press():\n    signal.raise_signal(signal.SIGINT)\n", namespace)
    namespace["press"]()


def test_plain_code_is_interrupted_at_once():
    with interrupt.handling_interrupts():
        with pytest.raises(KeyboardInterrupt):
            _run_inside("some.user.module")


def test_inside_jax_the_request_waits_for_the_next_checkpoint():
    with interrupt.handling_interrupts():
        _run_inside("jax._src.somewhere")  # no exception here
        with pytest.raises(KeyboardInterrupt):
            interrupt.checkpoint()
    interrupt.checkpoint()  # leaving the block forgets the request


def test_a_second_ctrl_c_raises_at_once_even_inside_jax():
    with interrupt.handling_interrupts():
        _run_inside("jaxlib.somewhere")
        with pytest.raises(KeyboardInterrupt):
            _run_inside("jaxlib.somewhere")


def test_inside_a_gc_callback_the_request_is_not_dropped():
    def callback(phase, info):
        if phase == "start":
            signal.raise_signal(signal.SIGINT)

    with interrupt.handling_interrupts():
        gc.callbacks.append(callback)
        try:
            gc.collect()  # Python would print and drop an exception raised here
        finally:
            gc.callbacks.remove(callback)
        with pytest.raises(KeyboardInterrupt):
            interrupt.checkpoint()


def test_the_previous_handler_comes_back_and_checkpoints_are_free_outside():
    before = signal.getsignal(signal.SIGINT)
    with interrupt.handling_interrupts():
        assert signal.getsignal(signal.SIGINT) is interrupt.deliver
    assert signal.getsignal(signal.SIGINT) is before
    interrupt.checkpoint()
