"""The resumable result store of a validation: one HDF5 file plus a directory of pending runs beside it.

Layout. The main file ``FILE`` holds one group ``runs/<key>`` per run: attribute ``summary`` (the record's
summary as JSON, task included), attribute ``meta`` (JSON: rdcheck version, git hash if known, creation time,
UTC), datasets ``coords``, ``final`` and ``history/<name>`` (``t``, ``mean``, ``lo``, ``hi``, ``rate``).
Documents (e.g. ``"study"``) are JSON text in attributes ``doc:<name>`` of the root group.

Crash safety. Only the driver writes. :meth:`Store.put` writes the run alone to ``FILE.runs/<key>.h5.tmp``,
fsyncs it, renames it to ``<key>.h5`` and fsyncs the directory, so a run is either entirely there or absent,
whenever the process dies (SIGKILL included). :meth:`Store.put_doc` does the same with ``<name>.json``.
:meth:`Store.consolidate` writes old main file plus pending entries to ``FILE.tmp``, fsyncs, renames it over
``FILE`` and only then deletes the pending files it folded in; a crash in between leaves duplicates, which
are read once (the main file wins). Stray ``*.tmp`` files are leftovers of a killed writer: the next writer
removes them. A writer holds an exclusive ``flock`` on the pending directory, so two drivers cannot write
one store at once; readers take no lock and never delete anything.
"""

from __future__ import annotations

import fcntl
import json
import os
import re
import subprocess
from collections.abc import Iterable, Sequence
from dataclasses import fields
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

import numpy as np

from .errors import InputError
from .runs import RunRecord, RunTask

__all__ = ["Store", "merge_stores", "merge_studies"]

#: Format tag written on the main file's root group.
FORMAT = "rdcheck-store-1"

_ARRAYS = ("coords", "final")
_DOC_NAME = re.compile(r"^[A-Za-z0-9_-]+$")
_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _h5py():
    import h5py

    return h5py


@lru_cache(maxsize=1)
def provenance() -> dict:
    """rdcheck version and git commit of the code that runs (``None`` when not in a git checkout)."""
    from . import __version__

    here = Path(__file__).resolve().parent
    try:
        out = subprocess.run(["git", "rev-parse", "HEAD"], cwd=here, capture_output=True, text=True, timeout=5)
        commit = out.stdout.strip() if out.returncode == 0 else None
    except (OSError, subprocess.SubprocessError):
        commit = None
    return {"rdcheck": __version__, "git": commit or None}


def _fsync_path(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _publish(tmp: Path, final: Path) -> None:
    """Make a fully written ``tmp`` durable and atomically visible as ``final``."""
    _fsync_path(tmp)
    os.replace(tmp, final)
    _fsync_path(final.parent)


def _write_run(group, record: RunRecord, meta: dict) -> None:
    """Write one record into an (empty) HDF5 group."""
    group.attrs["summary"] = json.dumps(record.summary())
    group.attrs["meta"] = json.dumps(meta)
    for name in _ARRAYS:
        group.create_dataset(name, data=np.asarray(getattr(record, name)))
    hist = group.create_group("history")
    for name, arr in record.history.items():
        hist.create_dataset(name, data=np.asarray(arr))


def _read_run(group) -> RunRecord:
    """Rebuild a record from its HDF5 group (exact arrays, summary fields as stored)."""
    summary = json.loads(group.attrs["summary"])
    known = {f.name for f in fields(RunRecord)}
    kwargs = {k: v for k, v in summary.items() if k in known}
    kwargs["task"] = RunTask.from_dict(summary["task"])
    for name in _ARRAYS:
        kwargs[name] = group[name][()]
    kwargs["history"] = {name: ds[()] for name, ds in group["history"].items()}
    return RunRecord(**kwargs)


def _read_meta(group) -> dict:
    return json.loads(group.attrs.get("meta", "{}"))


class Store:
    """Runs and documents of one validation, keyed by :attr:`RunRecord.key`; safe to kill at any moment.

    Parameters
    ----------
    path
        The main HDF5 file (created by the first write); pending entries live in ``path + ".runs"``.
    """

    def __init__(self, path: str | os.PathLike) -> None:
        self.path = Path(path)
        self.pending_dir = Path(f"{self.path}.runs")
        self._lock_fd: int | None = None
        self._meta: dict | None = None
        self.refresh()

    # reading -----------------------------------------------------------------------------------------
    def refresh(self) -> None:
        """Re-read which keys and documents exist (main file and pending directory)."""
        self._main_keys: set[str] = set()
        self._main_docs: dict[str, str] = {}
        if self.path.exists():
            with _h5py().File(self.path, "r") as f:
                if "runs" in f:
                    self._main_keys = set(f["runs"].keys())
                self._main_docs = {k[4:]: v for k, v in f.attrs.items() if k.startswith("doc:")}
        self._pending_keys: set[str] = set()
        self._pending_docs: set[str] = set()
        if self.pending_dir.is_dir():
            for entry in os.scandir(self.pending_dir):
                if entry.name.endswith(".h5"):
                    self._pending_keys.add(entry.name[:-3])
                elif entry.name.endswith(".json"):
                    self._pending_docs.add(entry.name[:-5])

    def keys(self) -> set[str]:
        """All stored run keys."""
        return self._main_keys | self._pending_keys

    def has(self, key: str) -> bool:
        """Whether a run is stored under ``key`` (from the cached key set: O(1))."""
        return key in self._main_keys or key in self._pending_keys

    def __len__(self) -> int:
        return len(self.keys())

    def __contains__(self, key: object) -> bool:
        return isinstance(key, str) and self.has(key)

    def get(self, key: str) -> RunRecord:
        """The record stored under ``key`` (KeyError if none)."""
        return self.get_many([key])[0]

    def get_many(self, keys: Sequence[str]) -> list[RunRecord]:
        """Records for ``keys``, in that order, reading the main file once."""
        return [rec for rec, _ in self._read(keys)]

    def meta(self, key: str) -> dict:
        """Provenance of one stored run: rdcheck version, git hash, creation time."""
        return self._read([key])[0][1]

    def records(self) -> list[RunRecord]:
        """Every stored record, sorted by key."""
        return self.get_many(sorted(self.keys()))

    def _read(self, keys: Sequence[str]) -> list[tuple[RunRecord, dict]]:
        missing = [k for k in keys if not self.has(k)]
        if missing:
            self.refresh()
            missing = [k for k in keys if not self.has(k)]
            if missing:
                msg = f"`key`: no run {missing[0]!r} in store {self.path}"
                raise KeyError(msg)
        out: dict[str, tuple[RunRecord, dict]] = {}
        pending = [k for k in keys if k in self._pending_keys]
        for k in pending:
            try:
                with _h5py().File(self.pending_dir / f"{k}.h5", "r") as f:
                    out[k] = (_read_run(f), _read_meta(f))
            except FileNotFoundError:  # folded into the main file by a consolidation since we looked
                self.refresh()
        rest = [k for k in keys if k not in out]
        if rest:
            with _h5py().File(self.path, "r") as f:
                runs = f["runs"]
                for k in rest:
                    out[k] = (_read_run(runs[k]), _read_meta(runs[k]))
        return [out[k] for k in keys]

    def get_doc(self, name: str, default: object = None) -> object:
        """The JSON document ``name`` (a pending version wins over the main file's), or ``default``."""
        if name in self._pending_docs:
            try:
                return json.loads((self.pending_dir / f"{name}.json").read_text(encoding="utf-8"))
            except FileNotFoundError:
                self.refresh()
        if name in self._main_docs:
            return json.loads(self._main_docs[name])
        return default

    def doc_names(self) -> set[str]:
        """Names of all stored documents."""
        return set(self._main_docs) | self._pending_docs

    # writing -----------------------------------------------------------------------------------------
    def _writer(self) -> None:
        """Become the store's only writer (flock on the pending directory) and clear a killed writer's debris."""
        if self._lock_fd is not None:
            return
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.pending_dir.mkdir(exist_ok=True)
        fd = os.open(self.pending_dir, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            msg = f"`store`: {self.path} is being written by another process"
            raise InputError(msg) from None
        self._lock_fd = fd
        for entry in os.scandir(self.pending_dir):
            if entry.name.endswith(".tmp"):
                os.unlink(entry.path)
        Path(f"{self.path}.tmp").unlink(missing_ok=True)
        if not self.path.exists():  # so that FILE exists (for `rdcheck report`, `ls`) from the first write on
            _write_main(self.path, [], [], {})
        self.refresh()

    def _run_meta(self) -> dict:
        if self._meta is None:
            self._meta = provenance()
        return {**self._meta, "created": datetime.now(timezone.utc).isoformat(timespec="seconds")}

    def put(self, record: RunRecord) -> None:
        """Store one run durably (atomic file + fsync); a key already stored is replaced (the newer wins)."""
        if not _KEY.match(record.key):
            msg = f"`record.key` must be letters, digits, '_' or '-', got {record.key!r}"
            raise ValueError(msg)
        self._writer()
        final = self.pending_dir / f"{record.key}.h5"
        tmp = final.with_name(final.name + ".tmp")
        with _h5py().File(tmp, "w") as f:
            _write_run(f, record, self._run_meta())
        _publish(tmp, final)
        self._pending_keys.add(record.key)

    def put_doc(self, name: str, obj: object) -> None:
        """Store the JSON document ``name`` durably (atomic replace)."""
        if not _DOC_NAME.match(name):
            msg = f"`name` must be letters, digits, '_' or '-', got {name!r}"
            raise ValueError(msg)
        text = json.dumps(obj)
        self._writer()
        final = self.pending_dir / f"{name}.json"
        tmp = final.with_name(final.name + ".tmp")
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, final)
        _fsync_path(self.pending_dir)
        self._pending_docs.add(name)

    def consolidate(self) -> None:
        """Fold pending runs and documents into the main file (new file, fsync, rename), then drop them."""
        self._writer()
        self.refresh()
        keys, docs = sorted(self._pending_keys), sorted(self._pending_docs)
        if not keys and not docs and self.path.exists():
            return
        sources = [self.pending_dir / f"{k}.h5" for k in keys]
        doc_text = {n: (self.pending_dir / f"{n}.json").read_text(encoding="utf-8") for n in docs}
        _write_main(self.path, [self.path] if self.path.exists() else [], sources, doc_text)
        # step: the new main file is durable; the pending copies are now duplicates
        for src in sources:
            src.unlink(missing_ok=True)
        for n in docs:
            (self.pending_dir / f"{n}.json").unlink(missing_ok=True)
        _fsync_path(self.pending_dir)
        self.refresh()

    def close(self) -> None:
        """Release the writer's lock (reading stays possible)."""
        if self._lock_fd is not None:
            os.close(self._lock_fd)
            self._lock_fd = None

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Store({str(self.path)!r}, runs={len(self)}, pending={len(self._pending_keys)})"


def _write_main(path: Path, mains: Iterable[Path], runs: Iterable[Path], docs: dict[str, str]) -> None:
    """Atomically write ``path`` from single-run files, main files and documents.

    The first source of a key wins, single-run (pending, newer) files before main files; documents in
    ``docs`` override those of the main files.
    """
    h5py = _h5py()
    tmp = Path(f"{path}.tmp")
    with h5py.File(tmp, "w") as out:
        out.attrs["format"] = FORMAT
        dest = out.create_group("runs")
        for src in runs:
            k = src.name[:-3]
            if k in dest:
                continue
            with h5py.File(src, "r") as f:
                g = dest.create_group(k)
                for name, value in f.attrs.items():
                    g.attrs[name] = value
                for name in f:
                    f.copy(f[name], g, name=name)
        for main in mains:
            with h5py.File(main, "r") as f:
                for name, value in f.attrs.items():
                    if name.startswith("doc:") and name not in out.attrs:
                        out.attrs[name] = value
                for k in f.get("runs", {}):
                    if k not in dest:
                        f.copy(f["runs"][k], dest, name=k)
        for name, text in docs.items():
            out.attrs[f"doc:{name}"] = text
    _publish(tmp, path)


def merge_stores(paths: Sequence[str | os.PathLike], out: str | os.PathLike) -> Store:
    """One consolidated store at ``out`` from several (e.g. shards): the union of runs, studies merged.

    A key in several stores is kept once (the first store's copy). ``study`` documents are merged by
    :func:`merge_studies`; any other document is taken from the first store that has it. ``out`` may be
    one of ``paths`` or an existing store, whose content is then kept.
    """
    out = Path(out)
    stores = [Store(p) for p in paths]
    for s in stores:
        if not s.path.exists() and not s.pending_dir.is_dir():
            msg = f"`paths`: no store at {s.path}"
            raise InputError(msg)
    target = Store(out)
    target.consolidate()
    sources = [target] + [s for s in stores if s.path.resolve() != out.resolve()]
    mains = [s.path for s in sources if s.path.exists()]
    pending = [s.pending_dir / f"{k}.h5" for s in sources for k in sorted(s._pending_keys)]
    docs: dict[str, str] = {}
    for name in sorted(set().union(*(s.doc_names() for s in sources))):
        values = [s.get_doc(name) for s in sources if name in s.doc_names()]
        docs[name] = json.dumps(merge_studies(values) if name == "study" else values[0])
    _write_main(out, mains, pending, docs)
    target.refresh()
    return target


# study documents -------------------------------------------------------------------------------------
_STUDY_IDENTITY = ("case", "overrides", "model", "sweep_parameter")


def merge_studies(studies: Sequence[dict]) -> dict:
    """Merge the ``study`` documents of shards: union of points by index (runs and thresholds per dim).

    Within a point and dimension: the noise run is the first one given, pulses are the union of
    ``[height, key]`` pairs sorted by height, and the threshold is the first searched one, a ``bracketed``
    one preferred and among those the narrowest (each bracket is made of real runs, so the narrowest is
    still honest). ``boundaries`` are united by ``(dim, between)`` (narrowest kept), ``widths`` by
    ``(dim, index, width)``, ``ratios`` by ``(ratio, dim)``. Studies of different cases or models are not merged.
    """
    if not studies:
        msg = "`studies` must not be empty"
        raise ValueError(msg)
    first = studies[0]
    for s in studies[1:]:
        for name in _STUDY_IDENTITY:
            if s.get(name) != first.get(name):
                msg = f"`studies`: shards differ in `{name}` ({first.get(name)!r} vs {s.get(name)!r})"
                raise InputError(msg)
    merged = dict(first)
    points: dict[int, dict] = {}
    for s in studies:
        for p in s.get("points", []):
            idx = int(p["index"])
            points[idx] = p if idx not in points else _merge_point(points[idx], p)
    merged["points"] = [points[i] for i in sorted(points)]
    merged["boundaries"] = _union(studies, "boundaries", lambda b: (b["dim"], tuple(b["between"])), _narrower)
    for name, ident in (("widths", lambda w: (w["dim"], w["index"], w["width"])),
                        ("ratios", lambda r: (r["ratio"], r.get("dim", 1)))):
        if any(name in s for s in studies):
            merged[name] = _union(studies, name, ident, lambda a, b: a)
    return merged


def _union(studies: Sequence[dict], name: str, ident, pick) -> list:
    seen: dict = {}
    for s in studies:
        for item in s.get(name, []) or []:
            k = ident(item)
            seen[k] = item if k not in seen else pick(seen[k], item)
    return list(seen.values())


def _width(entry: dict) -> float:
    lo, hi = entry.get("low"), entry.get("high")
    return float("inf") if lo is None or hi is None else abs(hi - lo)


def _narrower(a: dict, b: dict) -> dict:
    return b if _width(b) < _width(a) else a


def _better_threshold(a: dict | None, b: dict | None) -> dict | None:
    if a is None or b is None:
        return a if b is None else b
    rank = {"bracketed": 0, "never-patterned": 1, "always-patterned": 1}
    ra, rb = rank.get(a.get("status"), 2), rank.get(b.get("status"), 2)
    if ra != rb:
        return a if ra < rb else b
    return _narrower(a, b) if ra == 0 else a


def _merge_runs(a: dict | None, b: dict | None) -> dict | None:
    if a is None or b is None:
        return a if b is None else b
    pulses = {(float(h), k) for h, k in a.get("pulses", [])} | {(float(h), k) for h, k in b.get("pulses", [])}
    return {**a, "noise": a.get("noise") or b.get("noise"), "pulses": [list(p) for p in sorted(pulses)]}


def _merge_point(a: dict, b: dict) -> dict:
    out = dict(a)
    for field, combine in (("runs", _merge_runs), ("threshold", _better_threshold)):
        da, db = a.get(field) or {}, b.get(field) or {}
        if da or db:
            out[field] = {d: combine(da.get(d), db.get(d)) for d in sorted(set(da) | set(db))}
    return out
