"""Pieces run in children forked from the run's process (pipeline.execution, threads mode).

Real processes: each job runs in a child forked at the call, with the parent's memory as it
was (jobs here are closures, which pickle cannot carry, so nothing was pickled on the way),
and only the result comes back.
"""

from __future__ import annotations

import os
import sys

import pytest

from pipeline.config import ExecutionConfig
from pipeline.errors import InputFileError
from pipeline.execution import make_executor

pytestmark = pytest.mark.skipif(
    not sys.platform.startswith("linux"), reason="fork and PR_SET_PDEATHSIG are Linux's"
)


@pytest.fixture
def threads():
    with make_executor(ExecutionConfig(mode="threads", workers=2)) as ex:
        assert ex.forks_pieces
        yield ex


def test_each_job_runs_in_a_child_with_the_parents_memory_and_results_come_back_in_order(
    threads,
):
    table = {"rows": list(range(1000))}  # in memory only: the children see it by the fork
    jobs = [
        (lambda k=k: (k, os.getpid(), os.getppid(), sum(table["rows"][k::4]))) for k in range(4)
    ]
    got = threads.start_in_forks(jobs).results()
    assert [g[0] for g in got] == [0, 1, 2, 3]
    assert [g[3] for g in got] == [sum(range(k, 1000, 4)) for k in range(4)]
    pids = {g[1] for g in got}
    assert len(pids) == 4 and os.getpid() not in pids
    assert {g[2] for g in got} == {os.getpid()}


def test_an_error_the_run_reports_comes_back_as_itself(threads):
    def bad():
        raise InputFileError("roads.gpkg: no such layer")

    forks = threads.start_in_forks([lambda: "fine", bad])
    with pytest.raises(InputFileError, match="roads.gpkg: no such layer"):
        forks.results()


def test_an_internal_error_comes_back_with_the_childs_traceback(threads):
    def broken():
        return {}["missing"]

    with pytest.raises(RuntimeError, match=r"(?s)Traceback.*KeyError: 'missing'"):
        threads.start_in_forks([broken]).results()


def test_a_child_that_dies_without_a_result_fails_the_call(threads):
    with pytest.raises(RuntimeError, match="ended without its result"):
        threads.start_in_forks([lambda: os._exit(3)]).results()


def test_only_threads_mode_forks():
    for mode in ("local", "dask"):
        with make_executor(ExecutionConfig(mode=mode, workers=2)) as ex:
            assert not ex.forks_pieces
    with make_executor(ExecutionConfig(mode="threads", workers=1)) as ex:
        assert not ex.forks_pieces  # one thread asked for: one thing at a time


def test_a_child_writes_through_fresh_standard_streams_on_the_same_files(threads, capfd):
    """A lock another thread held on the inherited sys.stderr at the fork would stay held in
    the child: the child writes through new stream objects on file descriptors 1 and 2."""

    def job():
        print("from the child", file=sys.stderr)
        return sys.stderr is not sys.__stderr__ and sys.stdout is not sys.__stdout__

    assert threads.start_in_forks([job]).results() == [True]
    assert "from the child" in capfd.readouterr().err
