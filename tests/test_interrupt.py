"""Ctrl-C: raised at once in plain code, held back inside JAX and gc callbacks until a checkpoint."""

from __future__ import annotations

import gc
import signal

import pytest

from fitrank import interrupt

from tests._ctrl_c import press_ctrl_c_inside


def test_plain_code_is_interrupted_at_once():
    with interrupt.handling_interrupts():
        with pytest.raises(KeyboardInterrupt):
            press_ctrl_c_inside("some.user.module")


def test_inside_jax_the_request_waits_for_the_next_checkpoint():
    with interrupt.handling_interrupts():
        press_ctrl_c_inside("jax._src.somewhere")  # no exception here
        with pytest.raises(KeyboardInterrupt):
            interrupt.checkpoint()
    interrupt.checkpoint()  # leaving the block forgets the request


def test_a_second_ctrl_c_raises_at_once_even_inside_jax():
    with interrupt.handling_interrupts():
        press_ctrl_c_inside("jaxlib.somewhere")
        with pytest.raises(KeyboardInterrupt):
            press_ctrl_c_inside("jaxlib.somewhere")


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


def test_another_thread_neither_installs_a_handler_nor_forgets_the_main_threads_request():
    import threading

    with interrupt.handling_interrupts():
        press_ctrl_c_inside("jax._src.somewhere")  # a request waits
        worker = threading.Thread(target=lambda: interrupt.handling_interrupts().__enter__())
        worker.start()
        worker.join()
        with pytest.raises(KeyboardInterrupt):
            interrupt.checkpoint()


def test_an_ignored_sigint_stays_ignored():
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        with interrupt.handling_interrupts():
            assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN
        assert signal.getsignal(signal.SIGINT) is signal.SIG_IGN
    finally:
        signal.signal(signal.SIGINT, previous)


def test_a_waiting_request_stops_the_snapshot_solves_and_every_commit(tmp_path):
    from fitrank.atomic import staged_file, staged_folder
    from fitrank.pagerank import PageRankProblem
    from fitrank.snapshots import solve_snapshots
    from fitrank.weightings import make_weighting

    from tests._datasets import generated

    graph = generated("scale")[0].graph
    problem = PageRankProblem(graph, make_weighting("scale", graph))
    with interrupt.handling_interrupts():
        press_ctrl_c_inside()  # inside JAX: it waits for a checkpoint
        with pytest.raises(KeyboardInterrupt):
            solve_snapshots(problem, problem.weighting.sample(4), chunk_size=1, progress=False)
    target = tmp_path / "result.txt"
    target.write_text("earlier\n")
    with interrupt.handling_interrupts():
        press_ctrl_c_inside()  # inside JAX: it waits for a checkpoint
        with pytest.raises(KeyboardInterrupt), staged_file(target) as temp:
            temp.write_text("new\n")
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "a").write_text("earlier\n")
    with interrupt.handling_interrupts():
        press_ctrl_c_inside()  # inside JAX: it waits for a checkpoint
        with pytest.raises(KeyboardInterrupt), staged_folder(folder) as staging:
            (staging / "b").write_text("new\n")
    assert target.read_text() == "earlier\n" and [p.name for p in folder.iterdir()] == ["a"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["result.txt", "run"]  # no staging left behind


def test_a_failed_swap_puts_the_earlier_folder_back(tmp_path, monkeypatch):
    import os

    from fitrank import atomic

    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "a").write_text("earlier\n")
    real_rename = os.rename

    def rename(source, destination):
        if ".tmp-" in str(source):  # the new folder's move into place: Ctrl-C lands just before it
            raise KeyboardInterrupt
        real_rename(source, destination)

    monkeypatch.setattr(atomic.os, "rename", rename)
    with pytest.raises(KeyboardInterrupt), atomic.staged_folder(folder) as staging:
        (staging / "b").write_text("new\n")
    assert [p.name for p in folder.iterdir()] == ["a"] and sorted(p.name for p in tmp_path.iterdir()) == ["run"]
