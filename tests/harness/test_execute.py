"""Executors: equal to a plain loop, resumable, deduplicating, failures recorded, sharding stable."""

from __future__ import annotations

import hashlib
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from harness import runs
from harness.case import load_case
from harness.errors import InputError
from harness.execute import execute, parse_shard, shard, task_key
from harness.runs import RunRecord, RunTask, run_task
from harness.store import Store

ROOT = Path(__file__).resolve().parents[2]
CASE = str(ROOT / "cases" / "demo_1d_membrane_switch.toml")
FAST = ("solver.cells_1d=40",)


def demo_tasks(values=(0.1, 0.3, 0.5, 0.7), starts=(("noise", 1e-3), ("pulse", 1.0), ("pulse", 3.0))):
    """Small real runs of the demo (40 cells, well under a second each)."""
    case = load_case(CASE, FAST)
    return [RunTask(CASE, FAST, tuple(sorted({**case.parameters, "s": v}.items())), kind, h, 1, 40)
            for v in values for kind, h in starts]


# fake runs: module-level so that worker processes can unpickle them; the counter file is the task's path
def fake_key(task: RunTask) -> str:
    """Key of a fake task."""
    return hashlib.sha256(repr((task.params, task.start_value)).encode()).hexdigest()[:24]


def fake_tasks(counter: Path, values) -> list[RunTask]:
    """Fake tasks whose run appends its value to ``counter``."""
    return [RunTask(str(counter), (), (("x", float(v)),), "pulse", float(v), 1, 1) for v in values]


def _fake_record(task: RunTask) -> RunRecord:
    with open(task.case_path, "a") as fh:
        fh.write(f"{task.start_value:g}\n")
    return RunRecord(fake_key(task), task, "baseline", "fake", 1.0, None, "settled", 1, 0.0,
                     final=np.full((1, 3), task.start_value))


def raising_run(task: RunTask, wall_limit=None) -> RunRecord:
    """Value 13 raises a RuntimeError (after counting), others succeed."""
    rec = _fake_record(task)
    if task.start_value == 13:
        msg = "solver exploded"
        raise RuntimeError(msg)
    return rec


def crashing_run(task: RunTask, wall_limit=None) -> RunRecord:
    """Value 13 kills its own worker process, others succeed."""
    rec = _fake_record(task)
    if task.start_value == 13:
        os.kill(os.getpid(), signal.SIGKILL)
    return rec


def sleepy_run(task: RunTask, wall_limit=None) -> RunRecord:
    """Value 13 hangs (far past the hard timeout), others take a moment."""
    rec = _fake_record(task)
    time.sleep(60 if task.start_value == 13 else 0.05)
    return rec


def bad_input_run(task: RunTask, wall_limit=None) -> RunRecord:
    """Value 13 is bad input."""
    if task.start_value == 13:
        msg = "cases/x.toml: `starts.pulse`: missing"
        raise InputError(msg)
    return _fake_record(task)


def counts(counter: Path) -> dict[float, int]:
    """How often each fake value was run."""
    out: dict[float, int] = {}
    for line in counter.read_text().split():
        out[float(line)] = out.get(float(line), 0) + 1
    return out


def same_record(a: RunRecord, b: RunRecord) -> bool:
    """Equal outcomes, keys and final states (wall times differ)."""
    return (a.key == b.key and a.outcome == b.outcome and a.status == b.status and a.steps == b.steps
            and np.array_equal(a.final, b.final) and np.array_equal(a.coords, b.coords))


# executor --------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_pool_equals_plain_loop(tmp_path):
    """Records from two worker processes equal those of a plain loop of run_task, in task order."""
    tasks = demo_tasks(values=(0.1, 0.3), starts=(("noise", 1e-3), ("pulse", 1.0), ("pulse", 3.0)))
    loop = [run_task(t) for t in tasks]
    got = execute(tasks, Store(tmp_path / "s.h5"), key_of=task_key, workers=2, progress=False)
    assert all(same_record(a, b) for a, b in zip(loop, got))
    stored = Store(tmp_path / "s.h5")
    assert all(same_record(stored.get(r.key), r) for r in loop)
    assert {r.outcome for r in loop} == {"baseline", "stationary-pattern"}


def test_stored_keys_not_recomputed(tmp_path, monkeypatch):
    """A rerun computes only the tasks the store lacks, and a duplicate key within a batch only once."""
    calls = []

    def counting(task, wall_limit=None):
        calls.append(task)
        return run_task(task, wall_limit)

    monkeypatch.setattr(runs, "run_task", counting)
    tasks = demo_tasks(values=(0.1, 0.3), starts=(("pulse", 1.0), ("pulse", 3.0)))
    first = execute(tasks[:3], Store(tmp_path / "s.h5"), key_of=task_key, workers=0, progress=False)
    assert len(calls) == 3
    twin = replace(tasks[3], purpose="refine")
    second = execute([*tasks, twin], Store(tmp_path / "s.h5"), key_of=task_key, workers=0, progress=False)
    assert len(calls) == 4 and calls[-1] == tasks[3]
    assert [r.key for r in second] == [task_key(t) for t in [*tasks, twin]]
    assert second[3].key == second[4].key
    assert all(same_record(a, b) for a, b in zip(first, second))


@pytest.mark.parametrize("workers", [0, 2])
def test_exception_retried_once_then_failed(tmp_path, workers):
    """A run that raises is run twice, then stored as unsettled/failed with the reason; the rest complete; a
    rerun tries only the failed one again."""
    counter = tmp_path / "count.txt"
    tasks = fake_tasks(counter, [1, 13, 2, 3])
    store = Store(tmp_path / "s.h5")
    recs = execute(tasks, store, key_of=fake_key, workers=workers, run=raising_run, progress=False)
    assert counts(counter) == {1: 1, 13: 2, 2: 1, 3: 1}
    bad = recs[1]
    assert (bad.outcome, bad.status) == ("unsettled", "failed")
    assert bad.error.startswith("run raised RuntimeError: solver exploded") and "2 attempts" in bad.error
    assert Store(tmp_path / "s.h5").get(bad.key).error == bad.error
    assert [r.status for r in recs] == ["settled", "failed", "settled", "settled"]
    again = execute(tasks, store, key_of=fake_key, workers=workers, run=raising_run, progress=False)
    # a rerun tries the failed run again (twice more) and recomputes none of the finished ones
    assert counts(counter) == {1: 1, 13: 4, 2: 1, 3: 1}
    assert again[1].status == "failed" and again[1].error == bad.error


def test_hard_timeout_retried_once_then_failed(tmp_path):
    """A run past the hard timeout is killed, retried once, stored as failed; runs beside it complete."""
    counter = tmp_path / "count.txt"
    tasks = fake_tasks(counter, [13, 1, 2, 3, 4])
    recs = execute(tasks, Store(tmp_path / "s.h5"), key_of=fake_key, workers=2, run=sleepy_run, timeout=1.0,
                   progress=False)
    assert counts(counter)[13] == 2
    assert (recs[0].outcome, recs[0].status) == ("unsettled", "failed")
    assert recs[0].error.startswith("timed out after 1 s")
    assert all(r.status == "settled" for r in recs[1:])


def test_worker_crash_isolated_retried_then_failed(tmp_path):
    """A run that kills its worker is stored as failed ("worker crashed"); the runs beside it complete."""
    counter = tmp_path / "count.txt"
    tasks = fake_tasks(counter, [1, 13, 2, 3, 4, 5])
    recs = execute(tasks, Store(tmp_path / "s.h5"), key_of=fake_key, workers=2, run=crashing_run, progress=False)
    assert (recs[1].outcome, recs[1].status) == ("unsettled", "failed")
    assert recs[1].error.startswith("worker crashed:") and "2 attempts" in recs[1].error
    assert [r.status for i, r in enumerate(recs) if i != 1] == ["settled"] * 5
    assert 2 <= counts(counter)[13] <= 3  # charged twice alone; at most once more beside another run


@pytest.mark.parametrize("workers", [0, 2])
def test_input_error_stops_the_sweep(tmp_path, workers):
    """Bad input propagates as InputError with its one-line message; nothing is stored for it."""
    counter = tmp_path / "count.txt"
    store = Store(tmp_path / "s.h5")
    with pytest.raises(InputError, match=r"^cases/x.toml: `starts.pulse`: missing$"):
        execute(fake_tasks(counter, [13, 1]), store, key_of=fake_key, workers=workers, run=bad_input_run,
                progress=False)
    assert not Store(tmp_path / "s.h5").has(fake_key(fake_tasks(counter, [13])[0]))


def test_bad_arguments():
    """Negative workers, workers with a scheduler, and bad retries are refused."""
    with pytest.raises(ValueError, match="`workers`"):
        execute([], None, key_of=str, workers=-1)
    with pytest.raises(ValueError, match="exclude"):
        execute([], None, key_of=str, workers=2, scheduler="tcp://x:1")
    with pytest.raises(ValueError, match="`retries`"):
        execute([], None, key_of=str, retries=-1)


@pytest.mark.slow
def test_dask_cluster_matches_local_pool(tmp_path):
    """A real Dask LocalCluster gives the same keys and outcomes as the local process pool."""
    from distributed import LocalCluster

    tasks = demo_tasks(values=(0.1, 0.5), starts=(("noise", 1e-3), ("pulse", 1.0)))
    local = execute(tasks, Store(tmp_path / "a.h5"), key_of=task_key, workers=2, progress=False)
    with LocalCluster(processes=True, n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster:
        remote = execute(tasks, Store(tmp_path / "b.h5"), key_of=task_key, scheduler=cluster.scheduler_address,
                         progress=False)
    assert [(r.key, r.outcome) for r in remote] == [(r.key, r.outcome) for r in local]
    assert all(same_record(a, b) for a, b in zip(local, remote))
    assert Store(tmp_path / "b.h5").keys() == {r.key for r in local}


def test_dask_bad_address_is_input_error(tmp_path):
    """An address no scheduler listens on is bad input naming `--scheduler`."""
    with pytest.raises(InputError, match="`--scheduler`"):
        execute(fake_tasks(tmp_path / "c.txt", [1]), Store(tmp_path / "s.h5"), key_of=fake_key,
                scheduler="not a scheduler address", run=raising_run, progress=False)


# kill and resume -------------------------------------------------------------------------------------------
DRIVER = textwrap.dedent("""
    import os
    import sys

    import numpy as np

    from harness.case import load_case
    from harness.execute import execute, task_key
    from harness.runs import RunTask, run_task
    from harness.store import Store

    COUNTER = os.environ["RDCHECK_TEST_COUNTER"]  # workers see the environment, not the driver's argv


    def counting_run(task, wall_limit=None):
        rec = run_task(task, wall_limit)
        with open(COUNTER, "a") as fh:
            fh.write(rec.key + "\\n")
        return rec


    def main():
        store_path, case_path, workers = sys.argv[1], sys.argv[2], int(sys.argv[3])
        case = load_case(case_path, ("solver.cells_1d=60",))
        tasks = [RunTask(case_path, ("solver.cells_1d=60",), tuple(sorted({**case.parameters, "s": s}.items())),
                         kind, h, 1, 60) for s in np.linspace(0.1, 0.7, 4) for kind, h in
                 (("noise", 1e-3), ("pulse", 1.0), ("pulse", 3.0))]
        execute(tasks, Store(store_path), key_of=task_key, workers=workers, run=counting_run, progress=False)
        Store(store_path).consolidate()
        print("done")


    if __name__ == "__main__":
        main()
""")


def _lines(path: Path) -> list[str]:
    return path.read_text().split() if path.exists() else []


@pytest.mark.slow
def test_sigkill_at_random_moments_then_resume(tmp_path):
    """SIGKILL of the driver (and its workers) at random moments loses no stored run and recomputes none."""
    script = tmp_path / "driver.py"
    script.write_text(DRIVER)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    rnd = random.Random(20261202)
    stored_counts = []
    for trial, workers in enumerate([0, 2, 0, 2]):
        store_path, counter = tmp_path / f"s{trial}.h5", tmp_path / f"count{trial}.txt"
        env["RDCHECK_TEST_COUNTER"] = str(counter)
        cmd = [sys.executable, str(script), str(store_path), CASE, str(workers)]
        kills: list[tuple[set[str], int]] = []  # (keys stored, runs computed) when killed
        for _ in range(3):
            proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                    start_new_session=True)
            # step: wait until the driver has stored a random number of runs, then a random moment more
            target = len(kills[-1][0]) + rnd.randint(0, 4) if kills else rnd.randint(0, 8)
            delay = rnd.uniform(0.0, 0.03)  # about one run of 60 cells: longer waits let most sweeps finish
            pending = Path(f"{store_path}.runs")
            deadline = time.monotonic() + 60
            while proc.poll() is None and time.monotonic() < deadline:
                if pending.is_dir() and sum(p.suffix == ".h5" for p in pending.iterdir()) >= target:
                    break
                time.sleep(0.005)
            time.sleep(delay)
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)  # the driver and its workers, all at once
            proc.wait()
            before = Store(store_path)
            records = before.records()  # the store opens cleanly and every stored record reads
            assert {r.key for r in records} == before.keys()
            kills.append((before.keys(), len(_lines(counter))))
            stored_counts.append(len(before))
            for earlier, _ in kills:
                assert earlier <= before.keys()
        done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
        assert done.stdout.strip() == "done", done.stderr
        final = Store(store_path)
        assert len(final) == 12 and len(final.records()) == 12
        assert list(Path(f"{store_path}.runs").iterdir()) == []
        # step: a run stored before a kill is never computed after it
        lines = _lines(counter)
        assert set(lines) == final.keys()
        for stored, computed in kills:
            assert not stored & set(lines[computed:])
    print("runs stored at each kill:", stored_counts)
    assert sum(0 < c < 12 for c in stored_counts) >= 4, stored_counts  # most kills land mid-sweep


def _session_members(sid: int) -> list[int]:
    """Live processes of session ``sid`` (from /proc; field 6 of stat is the session id)."""
    out = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid and fields[0] != "Z":
            out.append(int(stat.parent.name))
    return out


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc")
def test_workers_exit_when_the_driver_is_killed(tmp_path):
    """SIGKILL of the driver alone leaves no worker behind (they watch for the driver and exit)."""
    script = tmp_path / "driver.py"
    script.write_text(DRIVER)
    store_path = tmp_path / "s.h5"
    env = {**os.environ, "PYTHONPATH": str(ROOT), "RDCHECK_TEST_COUNTER": str(tmp_path / "count.txt")}
    proc = subprocess.Popen([sys.executable, str(script), str(store_path), CASE, "2"], cwd=ROOT, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    pending = Path(f"{store_path}.runs")
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not (pending.is_dir() and any(pending.glob("*.h5"))):
        time.sleep(0.01)
    assert proc.poll() is None and len(_session_members(proc.pid)) >= 3  # driver, fork server, workers
    proc.kill()
    proc.wait()
    deadline = time.monotonic() + 20
    while _session_members(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    left = _session_members(proc.pid)
    if left:
        os.killpg(proc.pid, signal.SIGKILL)  # do not leak them into the rest of the suite
    assert left == []


# shards ---------------------------------------------------------------------------------------------------
def test_shards_partition_and_are_order_independent(rng):
    """The K/N shards are disjoint, cover all tasks, and do not depend on the order of the tasks."""
    items = [f"task-{i}" for i in range(200)]
    for n in (1, 2, 3, 7):
        parts = [shard(items, k, n, key_of=str) for k in range(1, n + 1)]
        assert sorted(sum(parts, [])) == sorted(items)
        assert sum(len(p) for p in parts) == len(items)
        shuffled = list(rng.permutation(items))
        assert [set(shard(shuffled, k, n, key_of=str)) for k in range(1, n + 1)] == [set(p) for p in parts]
    assert all(len(shard(items, k, 4, key_of=str)) > 20 for k in range(1, 5))


@pytest.mark.parametrize("text", ["", "3", "0/2", "3/2", "1/0", "a/b", "1/2/3", "-1/2", "1.5/2"])
def test_parse_shard_rejects(text):
    """Malformed `--shard` values are bad input naming the option and the expected form."""
    with pytest.raises(InputError, match=r"`--shard`: expected K/N with integers 1 <= K <= N"):
        parse_shard(text)


def test_parse_shard_accepts():
    """Well-formed `--shard` values give (K, N)."""
    assert parse_shard("1/1") == (1, 1) and parse_shard("2/4") == (2, 4) and parse_shard(" 3/3") == (3, 3)
