"""``lesion export``: take the trained arrays of one stored run out of lesion, as a ``.npz`` file.

A result set stores no weights, only their hash; the arrays are recovered by re-executing the
run with :func:`runtime.replay.replay` (fresh compile, recorded lane width) and are written only
when the re-executed parameter hash equals the stored ``param_hash`` — so the file holds
exactly the network the stored numbers describe, or nothing is written.

File layout (plain arrays, loadable with ``numpy.load(path)``, no pickle):

- ``params/<layer>/<name>``: ``l1/W`` … ``l<L>/W`` (inputs × outputs), ``b``, and a normalized
  layer's ``gamma``/``beta``;
- ``state/<layer>/<name>``: running statistics (``mean``, ``var`` of batch normalization);
- ``input/mean``, ``input/scale``: the run's standardization of the inputs, ``(x − mean) / scale``;
- ``split/validation``: the row indices of the run's validation split (into the data as loaded);
- ``lesion/run_id``, ``lesion/study_hash``, ``lesion/param_hash``, ``lesion/variant``: where it
  came from (``variant``: the resolved variant's canonical JSON).

The ``params/`` and ``state/`` arrays are what ``param_hash`` covers; the README defines it.
"""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from runtime.store import ResultSetError, open_result_set

__all__ = ["ExportRefused", "Exported", "export_run"]


class ExportRefused(ResultSetError):
    """The run's arrays could not be proven to be the stored ones; nothing was written."""


@dataclass
class Exported:
    path: Path
    run_id: str
    param_hash: str
    arrays: int
    status: str


def _one_run(rs, run: str) -> str:
    ids = rs.runs.column("run_id").to_pylist()
    matches = [r for r in ids if r == run] or [r for r in ids if r.startswith(run)]
    if not matches:
        raise ResultSetError(f"--run {run!r}: no such run in {rs.path} (see 'lesion show' for run ids)")
    if len(matches) > 1:
        raise ResultSetError(f"--run {run!r}: matches {len(matches)} runs ({', '.join(matches[:3])}"
                             f"{', …' if len(matches) > 3 else ''}); give more of the run id")
    return matches[0]


def export_run(result: str | Path, run: str, out: str | Path, on_group=None) -> Exported:
    """Re-execute ``run`` of the result set at ``result`` and write its arrays to ``out`` (.npz)."""
    from compiler.hashing import canonical_json
    from runtime.replay import replay

    out = Path(out)
    if out.suffix.lower() != ".npz":
        raise ResultSetError(f"-o {out}: expected a file ending in .npz")
    rs = open_result_set(result)
    run_id = _one_run(rs, run)
    report = replay(rs.path, run=run_id, on_group=on_group, keep_arrays=True)
    [row] = report.rows
    cols = rs.runs.to_pydict()
    i = cols["run_id"].index(run_id)
    stored = cols["param_hash"][i]
    if row.param_hash != "identical":
        cause = ("the environment differs from the recorded one: " + "; ".join(report.environment_changes)
                 if report.environment_changes else "in the recorded environment: the result set or the code changed")
        raise ExportRefused(f"run {run_id}: the re-executed parameters do not match the stored hash "
                            f"{stored[:16]}… ({cause}); nothing written")
    arrays = dict(report.arrays[run_id])
    variant = next(v for v in _variants(rs) if v.hash == cols["variant_hash"][i])
    arrays.update({"lesion/run_id": np.array(run_id), "lesion/study_hash": np.array(rs.study_hash),
                   "lesion/param_hash": np.array(stored),
                   "lesion/variant": np.array(canonical_json(variant.spec.model_dump(mode="json")).decode())})
    _atomic_savez(out, arrays)
    return Exported(out, run_id, stored, len(arrays), cols["status"][i])


def _variants(rs):
    from compiler.loader import load_text

    return load_text(rs.meta["spec_source"], rs.meta["spec_path"] or "stored spec").variants


def _atomic_savez(target: Path, arrays: dict[str, np.ndarray]) -> None:
    # An existing file at -o is replaced whole or not at all.
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as err:
        raise ResultSetError(f"-o {target}: cannot write ({err.strerror or err})") from None
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, **arrays)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException as err:
        Path(tmp).unlink(missing_ok=True)
        if isinstance(err, OSError):
            raise ResultSetError(f"-o {target}: cannot write ({err.strerror or err})") from None
        raise
