"""Files written for one run: the HDF5 layout of `rdcheck simulate --save`."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["save_simulation"]


def save_simulation(path: str | Path, model, result) -> None:
    """Write datasets `coords` (points x dim), `times`, `state` (snapshots x species x points), `final`, and
    attributes `species`, `outcome`, `params` (JSON) and the run's JSON summary; atomically (temp + rename)."""
    import h5py

    from solvers.records import probe_nodes

    path = Path(path)
    tmp = path.with_name(path.name + ".partial")
    try:
        with h5py.File(tmp, "w") as f:
            f.create_dataset("coords", data=np.asarray(result.coords, dtype=float))
            f.create_dataset("times", data=np.asarray(result.run.snap_t, dtype=float))
            f.create_dataset("state", data=np.asarray(result.run.snap_u, dtype=float), compression="gzip")
            f.create_dataset("final", data=np.asarray(result.run.u, dtype=float))
            hist = f.create_group("history")
            for name in ("t", "mean", "lo", "hi", "rate", "probe"):
                hist.create_dataset(name, data=getattr(result.run.history, name))
            hist.create_dataset("probe_nodes", data=probe_nodes(np.asarray(result.coords, dtype=float)))
            f.attrs["species"] = np.array(model.species, dtype=h5py.string_dtype())
            f.attrs["outcome"] = result.outcome.outcome
            f.attrs["params"] = json.dumps(result.params)
            f.attrs["summary"] = json.dumps(result.to_json(model.species), allow_nan=False)
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        msg = f"{path}: `--save`: cannot write ({exc.strerror or exc})"
        raise InputError(msg) from None
