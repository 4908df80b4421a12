"""The result store: exact round trips, atomic pending runs, consolidation, merging of shards."""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from harness.errors import InputError
from harness.runs import RunRecord, RunTask
from harness.store import Store, merge_stores, merge_studies


def fake_record(rng: np.random.Generator, i: int, outcome: str = "stationary-pattern") -> RunRecord:
    """A record with random arrays of the shapes a 1D run produces (no solver needed)."""
    task = RunTask("cases/demo.toml", ("solver.cells_1d=40",), (("d", 0.05), ("s", 0.1 + 0.01 * i)), "pulse",
                   1.0 + i, 1, 40, purpose="threshold", hss=(0.05 + 0.001 * i, 1.25))
    n, rows = 40, 7 + i
    return RunRecord(
        key=f"key{i:04d}", task=task, outcome=outcome, reason="a reason", t_final=123.25 + i,
        mass_drift=None if i % 2 else 1e-13 * i, status="settled", steps=10 + i, wall=0.01 * i,
        features={"regions": i, "areas": [1.5, 2.0]}, period=None if i % 3 else 4.5, error=None,
        coords=rng.random((n, 1)), final=rng.random((2, n)),
        history={"t": np.sort(rng.random(rows)), "mean": rng.random((rows, 2)), "lo": rng.random((rows, 2)),
                 "hi": rng.random((rows, 2)), "rate": rng.random(rows)},
    )


def assert_same(a: RunRecord, b: RunRecord) -> None:
    """Records are equal field by field, arrays exactly (values, shapes and dtypes)."""
    assert a.summary() == b.summary()
    assert a.task == b.task
    for name in ("coords", "final"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and x.shape == y.shape and np.array_equal(x, y)
    assert a.history.keys() == b.history.keys()
    for name in a.history:
        assert a.history[name].dtype == b.history[name].dtype and np.array_equal(a.history[name], b.history[name])


def test_round_trip_pending_then_consolidated(tmp_path, rng):
    """Records and documents come back exactly, before and after consolidation, in a fresh Store too."""
    recs = [fake_record(rng, i) for i in range(5)]
    store = Store(tmp_path / "s.h5")
    for r in recs:
        store.put(r)
    assert (tmp_path / "s.h5").exists()  # the named file exists from the first write on
    doc = {"points": [{"index": 0, "value": 0.1}], "tolerance": 0.02, "nested": {"a": [1, None, "x"]}}
    store.put_doc("study", doc)
    for s in (store, Store(tmp_path / "s.h5")):
        assert s.keys() == {r.key for r in recs} and all(s.has(r.key) for r in recs)
        for r in recs:
            assert_same(s.get(r.key), r)
        assert s.get_doc("study") == doc
    store.consolidate()
    assert list((tmp_path / "s.h5.runs").iterdir()) == []
    fresh = Store(tmp_path / "s.h5")
    assert len(fresh) == 5 and fresh.get_doc("study") == doc and fresh.get_doc("absent", 7) == 7
    for a, b in zip(fresh.records(), recs):
        assert_same(a, b)


def test_meta_has_version_and_time(tmp_path, rng):
    """Each run carries the rdcheck version, the git hash field and its creation time."""
    from harness import __version__

    store = Store(tmp_path / "s.h5")
    store.put(fake_record(rng, 0))
    meta = store.meta("key0000")
    assert meta["rdcheck"] == __version__ and "git" in meta and meta["created"].startswith("20")
    store.consolidate()
    assert Store(tmp_path / "s.h5").meta("key0000") == meta


def test_consolidate_keeps_old_main_and_new_runs(tmp_path, rng):
    """A second consolidation folds new pending runs into the existing main file; later docs win."""
    store = Store(tmp_path / "s.h5")
    store.put(fake_record(rng, 0))
    store.put_doc("study", {"v": 1})
    store.consolidate()
    r1 = fake_record(rng, 1)
    store.put(r1)
    store.put_doc("study", {"v": 2})
    assert store.get_doc("study") == {"v": 2}
    store.consolidate()
    s = Store(tmp_path / "s.h5")
    assert s.keys() == {"key0000", "key0001"} and s.get_doc("study") == {"v": 2}
    assert_same(s.get("key0001"), r1)


def test_stray_tmp_files_ignored_then_removed(tmp_path, rng):
    """Half-written files of a killed writer are invisible, and the next writer deletes them."""
    store = Store(tmp_path / "s.h5")
    store.put(fake_record(rng, 0))
    store.close()
    pending = tmp_path / "s.h5.runs"
    (pending / "deadbeef.h5.tmp").write_bytes(b"\x89HDF half")
    (pending / "study.json.tmp").write_text("{\"trunc")
    (tmp_path / "s.h5.tmp").write_bytes(b"half a main file")
    s = Store(tmp_path / "s.h5")
    assert s.keys() == {"key0000"} and s.get_doc("study") is None
    s.put(fake_record(rng, 1))
    assert sorted(p.name for p in pending.iterdir()) == ["key0000.h5", "key0001.h5"]
    assert not (tmp_path / "s.h5.tmp").exists()


def test_duplicates_after_interrupted_consolidation(tmp_path, rng):
    """A crash between the rename and the removals leaves duplicates: read once, folded by the next consolidation."""
    r = fake_record(rng, 3)
    store = Store(tmp_path / "s.h5")
    store.put(r)
    pending = tmp_path / "s.h5.runs" / "key0003.h5"
    shutil.copy(pending, tmp_path / "copy.h5")
    store.consolidate()
    store.close()
    shutil.copy(tmp_path / "copy.h5", pending)
    s = Store(tmp_path / "s.h5")
    assert len(s) == 1 and len(s.records()) == 1
    assert_same(s.get(r.key), r)
    s.put(fake_record(rng, 4))
    s.consolidate()
    assert not pending.exists() and Store(tmp_path / "s.h5").keys() == {"key0003", "key0004"}


def test_put_replaces_a_consolidated_run(tmp_path, rng):
    """Putting a stored key again replaces the run, before and after the next consolidation."""
    from dataclasses import replace

    r = fake_record(rng, 5)
    store = Store(tmp_path / "s.h5")
    store.put(r)
    store.consolidate()
    newer = replace(r, outcome="baseline", error="rerun")
    store.put(newer)
    assert len(store) == 1
    for s in (store, Store(tmp_path / "s.h5")):
        assert_same(s.get(r.key), newer)
    store.consolidate()
    assert_same(Store(tmp_path / "s.h5").get(r.key), newer)


def test_second_writer_refused(tmp_path, rng):
    """Two drivers cannot write one store at once; readers still can read."""
    a = Store(tmp_path / "s.h5")
    a.put(fake_record(rng, 0))
    b = Store(tmp_path / "s.h5")
    with pytest.raises(InputError, match="being written by another process"):
        b.put(fake_record(rng, 1))
    assert b.has("key0000")
    a.close()
    b.put(fake_record(rng, 1))
    assert Store(tmp_path / "s.h5").keys() == {"key0000", "key0001"}


def test_missing_key_and_bad_names(tmp_path, rng):
    """Unknown keys raise KeyError; keys and document names that are not file-safe are refused."""
    store = Store(tmp_path / "s.h5")
    with pytest.raises(KeyError, match="no run 'nope'"):
        store.get("nope")
    from dataclasses import replace

    with pytest.raises(ValueError, match="`record.key`"):
        store.put(replace(fake_record(rng, 0), key="../x"))
    with pytest.raises(ValueError, match="`name`"):
        store.put_doc("a/b", {})


def _study(indices, pulses_of, case="cases/demo.toml"):
    points = []
    for i in indices:
        pulses = [[h, f"k{i}-{h}"] for h in pulses_of(i)]
        points.append({"index": i, "params": {"s": i / 10}, "value": i / 10,
                       "runs": {"1": {"noise": f"n{i}" if i % 2 == 0 else None, "pulses": pulses}},
                       "threshold": {"1": {"low": 0.5, "high": 2.0, "resolution": 40, "refined": None,
                                           "status": "bracketed"}}})
    return {"case": case, "overrides": [], "model": "m", "sweep_parameter": "s", "points": points,
            "boundaries": [{"dim": 1, "between": [i, i + 1], "low": 0.1, "high": 0.3} for i in indices[:1]]}


def test_merge_two_shards_gives_the_union(tmp_path, rng):
    """Merging two shard stores gives every run once and the union of the studies' points."""
    recs = [fake_record(rng, i) for i in range(8)]
    a, b = Store(tmp_path / "a.h5"), Store(tmp_path / "b.h5")
    for r in recs[:5]:
        a.put(r)
    for r in recs[3:]:
        b.put(r)
    b.consolidate()  # one shard consolidated, the other still pending
    a.put_doc("study", _study([0, 1, 2], lambda i: [1.0]))
    b.put_doc("study", _study([2, 3], lambda i: [2.0, 1.0]))
    merged = merge_stores([tmp_path / "a.h5", tmp_path / "b.h5"], tmp_path / "all.h5")
    assert merged.keys() == {r.key for r in recs}
    again = Store(tmp_path / "all.h5")
    for r in recs:
        assert_same(again.get(r.key), r)
    study = again.get_doc("study")
    assert [p["index"] for p in study["points"]] == [0, 1, 2, 3]
    p2 = study["points"][2]["runs"]["1"]
    assert p2["noise"] == "n2" and p2["pulses"] == [[1.0, "k2-1.0"], [2.0, "k2-2.0"]]
    assert sorted(tuple(bd["between"]) for bd in study["boundaries"]) == [(0, 1), (2, 3)]


def test_merge_studies_narrowest_bracket_and_refusal():
    """The narrowest bracketed threshold wins; studies of different cases are not merged."""
    a, b = _study([0], lambda i: [1.0]), _study([0], lambda i: [1.5])
    b["points"][0]["threshold"]["1"].update(low=1.0, high=1.5)
    merged = merge_studies([a, b])
    assert merged["points"][0]["threshold"]["1"]["low"] == 1.0
    assert merged["points"][0]["threshold"]["1"]["high"] == 1.5
    with pytest.raises(InputError, match="differ in `case`"):
        merge_studies([a, _study([1], lambda i: [], case="cases/other.toml")])


def test_reader_survives_a_consolidation(tmp_path, rng):
    """A reader opened before a consolidation still reads runs whose pending files were folded away."""
    r = fake_record(rng, 2)
    writer = Store(tmp_path / "s.h5")
    writer.put(r)
    reader = Store(tmp_path / "s.h5")
    writer.consolidate()
    assert_same(reader.get(r.key), r)


def test_has_uses_the_cached_keys(tmp_path, rng, monkeypatch):
    """After opening, `has` answers from memory: no file system access per call."""
    store = Store(tmp_path / "s.h5")
    store.put(fake_record(rng, 0))
    store.consolidate()
    s = Store(tmp_path / "s.h5")

    def no_disk(*args, **kwargs):
        msg = "touched the disk"
        raise AssertionError(msg)

    monkeypatch.setattr("os.scandir", no_disk)
    monkeypatch.setattr("h5py.File", no_disk)
    assert s.has("key0000") and not s.has("key0001") and "key0000" in s


class _Killed(BaseException):
    """Stands for the process dying at that point (nothing after it runs)."""


def test_death_inside_put_leaves_no_half_run(tmp_path, rng, monkeypatch):
    """Dying halfway through writing a run leaves only a stray temp file: not reported, cleaned up later."""
    import harness.store as store_mod

    store = Store(tmp_path / "s.h5")
    store.put(fake_record(rng, 0))
    real = store_mod._write_run

    def dies_halfway(group, record, meta):
        group.attrs["summary"] = "{"
        group.create_dataset("coords", data=record.coords)
        raise _Killed

    monkeypatch.setattr(store_mod, "_write_run", dies_halfway)
    with pytest.raises(_Killed):
        store.put(fake_record(rng, 1))
    store.close()
    monkeypatch.setattr(store_mod, "_write_run", real)
    fresh = Store(tmp_path / "s.h5")
    assert fresh.keys() == {"key0000"} and len(fresh.records()) == 1
    fresh.put(fake_record(rng, 2))
    assert not list((tmp_path / "s.h5.runs").glob("*.tmp"))


def test_death_inside_consolidate_keeps_old_main_and_pending(tmp_path, rng, monkeypatch):
    """Dying before the new main file is renamed in keeps the old main file and every pending run."""
    import harness.store as store_mod

    recs = [fake_record(rng, i) for i in range(3)]
    store = Store(tmp_path / "s.h5")
    store.put(recs[0])
    store.consolidate()
    store.put(recs[1])
    store.put(recs[2])

    def dies(tmp, final):
        raise _Killed

    monkeypatch.setattr(store_mod, "_publish", dies)
    with pytest.raises(_Killed):
        store.consolidate()
    store.close()
    monkeypatch.undo()
    assert (tmp_path / "s.h5.tmp").exists()
    fresh = Store(tmp_path / "s.h5")
    for r in recs:
        assert_same(fresh.get(r.key), r)
    fresh.consolidate()
    assert not (tmp_path / "s.h5.tmp").exists() and Store(tmp_path / "s.h5").keys() == {r.key for r in recs}
