"""Workers forked before the computation: they write what the run would, and any failure leaves the work to the run."""

from __future__ import annotations

import os

import pytest
from rockhead.core.products.background import fork_is_safe

needs_fork = pytest.mark.skipif(not hasattr(os, "fork"), reason="a child process needs fork (POSIX)")


def test_no_child_when_asked_not_to(monkeypatch):
    monkeypatch.setenv("ROCKHEAD_NO_FORK", "1")
    assert not fork_is_safe()


# ------------------------------------------------------------------ workers forked before the computation


def _write_pid(folder):
    def work(payload):
        (folder / payload).write_text(str(os.getpid()))
        return [payload]

    return work


@needs_fork
def test_early_workers_warm_up_then_get_the_payload(tmp_path):
    """Each child warms up on its own (its state never reaches the parent), then works on the handed-over payload."""
    from rockhead.core.products.background import EarlyWorkers

    warmed = []

    def warm():
        warmed.append(os.getpid())
        (tmp_path / f"warm_{os.getpid()}").touch()

    def work(payload):
        name, data = payload
        (tmp_path / name).write_bytes(data + str(len(warmed)).encode())  # warmed once, in this process
        return [name]

    with EarlyWorkers([(warm, [work])], parallel=True) as workers:
        assert workers.running
        assert workers.hand_over(("a.bin", bytes(range(10))))
        assert workers.collect(0) == ["a.bin"]
    assert (tmp_path / "a.bin").read_bytes() == bytes(range(10)) + b"1"
    assert warmed == []  # the warm-up ran in the child's memory only
    assert len(list(tmp_path.glob("warm_*"))) == 1


@needs_fork
def test_early_workers_each_do_their_own_work(tmp_path):
    from rockhead.core.products.background import EarlyWorkers

    def work_as(name):
        def work(payload):
            (tmp_path / name).write_text(f"{payload} {os.getpid()}")
            return [name]

        return work

    with EarlyWorkers([(lambda: None, [work_as("one")]), (lambda: None, [work_as("two")])], parallel=True) as workers:
        assert workers.hand_over("payload")
        assert workers.collect(1) == ["two"]
        assert workers.collect(0) == ["one"]
    pids = {(tmp_path / n).read_text().split()[1] for n in ("one", "two")}
    assert len(pids) == 2 and str(os.getpid()) not in pids  # two children, neither the parent
    assert all((tmp_path / n).read_text().startswith("payload ") for n in ("one", "two"))


@needs_fork
def test_the_works_of_a_group_share_one_warm_up_in_processes_of_their_own(tmp_path):
    """A group warms up once (matplotlib imported once) and its works still run side by side."""
    import resource

    from rockhead.core.products.background import EarlyWorkers

    def warm():
        (tmp_path / f"warm_{os.getpid()}").touch()

    def work_as(name):
        def work(payload):
            import time

            (tmp_path / name).write_text(str(os.getpid()))
            start = time.process_time()
            while time.process_time() - start < 0.2:  # 0.2 s of processor time in each work's process
                pass
            return [name]

        return work

    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    with EarlyWorkers([(warm, [work_as("a"), work_as("b"), work_as("c")])], parallel=True) as workers:
        assert workers.hand_over(None)
        assert [workers.collect(k) for k in (2, 0, 1)] == [["c"], ["a"], ["b"]]
        assert not workers.running
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    assert len(list(tmp_path.glob("warm_*"))) == 1  # one warm-up for the three works
    pids = {(tmp_path / n).read_text() for n in "abc"}
    assert len(pids) == 3 and str(os.getpid()) not in pids
    # every work's processor time reaches this process (the group's child waits for its own children):
    # 3 x 0.2 s burnt; without the second and third works counted it would be about 0.2 s
    assert after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime >= 0.55


@needs_fork
def test_a_payload_that_does_not_pickle_leaves_the_work_here(tmp_path):
    from rockhead.core.products.background import EarlyWorkers

    with EarlyWorkers([(lambda: None, [_write_pid(tmp_path)])], parallel=True) as workers:
        assert not workers.hand_over(lambda: "a closure does not pickle")
        assert not workers.running  # sent away
        assert workers.collect(0) is None  # the caller does the work itself
    assert list(tmp_path.iterdir()) == []


@needs_fork
def test_a_failing_worker_answers_none(tmp_path):
    """The caller then does the work itself and meets the error where it can be handled."""
    from rockhead.core.products.background import EarlyWorkers

    def work(payload):
        raise ValueError("no such page")

    with EarlyWorkers([(lambda: None, [work])], parallel=True) as workers:
        assert workers.hand_over("x")
        assert workers.collect(0) is None


@needs_fork
def test_a_worker_s_warnings_are_issued_in_the_parent():
    import warnings

    from rockhead.core.products.background import EarlyWorkers

    def work(payload):
        warnings.warn(f"glyph missing in {payload}", UserWarning, stacklevel=1)
        return []

    with EarlyWorkers([(lambda: None, [work])], parallel=True) as workers:
        assert workers.hand_over("the title")
        with pytest.warns(UserWarning, match="glyph missing in the title"):
            assert workers.collect(0) == []


@needs_fork
def test_an_error_before_the_hand_over_stops_the_workers(tmp_path):
    import time

    def warm():
        time.sleep(30)

    start = time.perf_counter()
    from rockhead.core.products.background import EarlyWorkers

    with pytest.raises(RuntimeError, match="computation failed"):
        with EarlyWorkers([(warm, [_write_pid(tmp_path)])], parallel=True) as workers:
            raise RuntimeError("computation failed")
    assert time.perf_counter() - start < 10  # killed, not waited for (the warm-up would take 30 s)
    assert not workers.running
    assert list(tmp_path.iterdir()) == []


def test_no_early_workers_without_fork(tmp_path):
    from rockhead.core.products.background import EarlyWorkers

    with EarlyWorkers([(lambda: None, [_write_pid(tmp_path)])], parallel=False) as workers:
        assert not workers.running
        assert not workers.hand_over("a.txt")
    assert list(tmp_path.iterdir()) == []


@needs_fork
def test_early_workers_let_go_of_the_run_folders_lock(tmp_path):
    from rockhead.core.formats.runfolder import RunFolder
    from rockhead.core.products.background import EarlyWorkers

    with RunFolder(tmp_path / "out", {}) as folder:
        (fd,) = folder.lock_descriptors()

        def work(payload):
            try:
                os.fstat(fd)
                state = "open"
            except OSError:
                state = "closed"
            folder.path("state.txt").write_text(state)
            return ["state.txt"]

        with EarlyWorkers([(lambda: None, [work])], parallel=True, close_in_child=folder.lock_descriptors()) as w:
            assert w.hand_over(None)
            for rel in w.collect(0):
                folder.path(rel)
        assert (folder.staging / "state.txt").read_text() == "closed"
        os.fstat(fd)  # still open here: the run keeps its lock
        folder.commit()
    assert (tmp_path / "out" / "state.txt").read_text() == "closed"


@needs_fork
def test_no_process_to_be_had_leaves_the_work_here(tmp_path, monkeypatch):
    """A fork that fails (no memory, a process limit) is no error: the run does the work itself."""
    import errno

    from rockhead.core.products.background import EarlyWorkers

    forks = []
    real_fork = os.fork

    def second_fork_fails():
        forks.append(1)
        if len(forks) == 2:
            raise OSError(errno.EAGAIN, "Resource temporarily unavailable")
        return real_fork()

    monkeypatch.setattr(os, "fork", second_fork_fails)
    groups = [(lambda: None, [_write_pid(tmp_path)]), (lambda: None, [_write_pid(tmp_path)])]
    with EarlyWorkers(groups, parallel=True) as workers:
        assert not workers.running  # the first child was stopped again
        assert not workers.hand_over("a.txt")
        assert workers.collect(0) is None and workers.collect(1) is None
    assert list(tmp_path.iterdir()) == []


@needs_fork
@pytest.mark.skipif(not os.path.exists("/proc/self"), reason="the parent-death signal is Linux's")
@pytest.mark.slow  # a run killed and its workers waited out
def test_the_workers_of_a_killed_run_write_nothing(tmp_path):
    """A run killed with SIGKILL after the hand-over: its workers (and a group's further work) die with it."""
    import signal
    import time

    from rockhead.core.products.background import EarlyWorkers

    def slow_warm():
        time.sleep(1.0)

    def write_as(name):
        def work(payload):
            (tmp_path / name).write_text("late")
            return [name]

        return work

    run = os.fork()
    if run == 0:  # the run: starts its workers, hands over, then is killed
        try:
            workers = EarlyWorkers([(slow_warm, [write_as("a"), write_as("b")])], parallel=True)
            workers.hand_over("payload")
            os.kill(os.getpid(), signal.SIGKILL)
        finally:
            os._exit(3)
    _, status = os.waitpid(run, 0)
    assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL
    time.sleep(2.5)  # longer than the warm-up and the work would take
    assert list(tmp_path.iterdir()) == []
