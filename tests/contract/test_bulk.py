"""The collector pause around bulk work: nested and overlapping blocks, and a collector
someone else turned off, are left as they should be."""

from __future__ import annotations

import gc
import threading

from atomq.bulk import collector_paused


def test_the_collector_resumes_only_when_the_last_block_ends() -> None:
    assert gc.isenabled()
    first_inside, release = threading.Event(), threading.Event()

    def other_request() -> None:
        with collector_paused():
            first_inside.set()
            release.wait(10)

    other = threading.Thread(target=other_request)
    other.start()
    first_inside.wait(10)
    with collector_paused():
        assert not gc.isenabled()
    assert not gc.isenabled()  # the other block still runs
    release.set()
    other.join()
    assert gc.isenabled()


def test_a_collector_turned_off_elsewhere_stays_off() -> None:
    gc.disable()
    try:
        with collector_paused():
            pass
        assert not gc.isenabled()
    finally:
        gc.enable()
