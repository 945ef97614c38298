"""Work started beside a fit: on a second connection in order, at once without one, dropped after a failure.
(The profiles read this way on PostgreSQL are checked in test_profile_routes.py and test_fit.py.)"""

from __future__ import annotations

import contextlib
import threading

import pytest

from featpipe.errors import FeatpipeError
from featpipe.fitting.beside import beside


class Engine:
    """An engine with a second connection (`twin`), or none when `twin` is None."""

    def __init__(self, twin):
        self.twin = twin

    @contextlib.contextmanager
    def beside(self):
        yield self.twin


def test_work_runs_in_order_on_the_second_connection_and_waits_for_nothing_else():
    done, release = [], threading.Event()

    def slow(engine, name):
        assert release.wait(timeout=60)
        done.append((engine, name))
        return name

    def quick(engine, name):
        done.append((engine, name))
        return name

    with beside(Engine("twin")) as start:
        first, second = start(slow, "a"), start(quick, "b")
        assert done == []  # both wait on the second connection's thread; the caller goes on
        release.set()
        assert (second(), first()) == ("b", "a")
    assert done == [("twin", "a"), ("twin", "b")]


def test_without_a_second_connection_work_is_done_at_once_on_the_engine():
    engine, done = Engine(None), []
    with beside(engine) as start:
        result = start(lambda on, name: done.append((on, name)) or name, "a")
        assert done == [(engine, "a")]
    assert result() == "a"


def test_after_the_callers_failure_work_not_yet_begun_is_dropped():
    done, release = [], threading.Event()

    def running(engine):
        assert release.wait(timeout=60)
        done.append("running")

    with pytest.raises(FeatpipeError, match="refused"), beside(Engine("twin")) as start:
        start(running)
        start(lambda engine: done.append("queued"))
        threading.Timer(0.5, release.set).start()  # the running work ends after the queued work was dropped
        raise FeatpipeError("refused")
    assert done == ["running"]  # the work already running finishes; the queued work never starts
