"""Pausing the cyclic garbage collector: nested and overlapping pauses, and errors."""

from __future__ import annotations

import doctest
import gc
import threading

import pytest

from service import gc_pause
from service.gc_pause import paused_garbage_collection


def test_docstring_example() -> None:
    assert doctest.testmod(gc_pause).failed == 0


def test_nested_pauses_resume_once_the_outer_one_ends() -> None:
    assert gc.isenabled()
    with paused_garbage_collection():
        with paused_garbage_collection():
            assert not gc.isenabled()
        assert not gc.isenabled()
    assert gc.isenabled()


def test_an_error_inside_still_resumes_collection() -> None:
    with pytest.raises(ValueError), paused_garbage_collection():
        raise ValueError("bad body")
    assert gc.isenabled()


def test_a_collector_that_was_off_stays_off() -> None:
    gc.disable()
    try:
        with paused_garbage_collection():
            pass
        assert not gc.isenabled()
    finally:
        gc.enable()


def test_overlapping_pauses_across_threads() -> None:
    inside = threading.Barrier(2)
    release = threading.Event()

    def pause_and_wait() -> None:
        with paused_garbage_collection():
            inside.wait(timeout=10)
            release.wait(timeout=10)

    thread = threading.Thread(target=pause_and_wait)
    thread.start()
    with paused_garbage_collection():
        inside.wait(timeout=10)
    assert not gc.isenabled()  # the other thread's pause still holds
    release.set()
    thread.join(timeout=10)
    assert gc.isenabled()
