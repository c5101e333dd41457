"""Result sets written by an earlier lesion, read in today's names.

A result set records its format (``lesion.format`` in the Parquet metadata; none means format 1).
Every reader opens result sets through ``runtime.store.open_result_set``, which hands older ones
to :func:`migrate`: columns, values and labels are renamed in memory, the files are not touched
(their stored hashes are checked against the tables as stored). A resumed run rewrites the whole
result set, so it is then stored in the current format. Identities do not move: hashes are
computed over the identity form (:mod:`compiler.vocabulary`), so an old result set's run ids,
study hash and folder name are those its spec derives today.

Format 2 renamed (old → new), see :data:`COLUMNS` and :func:`column_name`; variant labels of
grids and one-at-a-time studies are re-derived from the stored spec.
"""

from __future__ import annotations

import json
import re

import pyarrow as pa

from compiler.vocabulary import VALUE_WORDS, respell

__all__ = ["FORMAT", "COLUMNS", "LAYER", "STATUS", "column_name", "key_column", "key_of", "migrate"]

FORMAT = 2

# Whole column names that changed in format 2 (the per-layer gradient norms: see LAYER).
COLUMNS = {
    "diverged_at": "non_finite_epoch",
    # one word, program, for what variants share a compiled program by (the structure key)
    "structure": "program",
    # one word, hash, for every SHA-256 value lesion stores
    "param_digest": "param_hash",
    "data_fingerprint": "data_hash",
    "env_fingerprint": "env_hash",
}
# grad_norm_l<i> read as an L<i> norm: now grad_norm_layer<i> (also as final_…).
LAYER = re.compile(r"^(final_)?grad_norm_l(\d+)$")
# Values of the ``status`` column that changed in format 2.
STATUS = {
    "diverged": "non_finite",
}


def key_column(key: str) -> str:
    """The column of a varied dotted key: ``a.b.c`` → ``a__b__c`` (SQL, pandas and Arrow take it
    bare; no key of a spec has ``__`` inside a part, so the dots come back unambiguously)."""
    return key.replace(".", "__")


def key_of(column: str) -> str:
    """The dotted key of a varied key's column."""
    return column.replace("__", ".")


def column_name(name: str, keys: set[str] = frozenset()) -> str:
    """Today's name of a format-1 column (``keys``: the varied dotted keys of the study)."""
    if name in keys:
        return key_column(name)
    if m := LAYER.match(name):
        return f"{m.group(1) or ''}grad_norm_layer{m.group(2)}"
    return COLUMNS.get(name, name)


def _strings(col: pa.ChunkedArray, change) -> pa.Array:
    from runtime.store import column   # store imports this module
    return column([None if v is None else change(v) for v in col.to_pylist()], pa.string())


def _key_values(key: str, col: pa.ChunkedArray) -> pa.ChunkedArray | pa.Array:
    """A varied key's column with old words of its values respelled (JSON cells for tables)."""
    if not pa.types.is_string(col.type) or not any(p == key or p.startswith(key + ".") for p in VALUE_WORDS):
        return col
    words = VALUE_WORDS.get(key, {})

    def change(text):
        if key in VALUE_WORDS:
            return words.get(text, text)
        return json.dumps(_respelled(key, json.loads(text)), sort_keys=True)
    return _strings(col, change)


def _respelled(key: str, value):
    tree, _ = respell({"ablation": {"axis": [{"key": key, "values": [value]}]}})
    return tree["ablation"]["axis"][0]["values"][0]


def _changes(text: str) -> str:
    changes = json.loads(text)
    return json.dumps({k: _respelled(k, v) for k, v in changes.items()}, sort_keys=True)


def migrate(runs: pa.Table, curves: pa.Table, fmt: int, labels) -> tuple[pa.Table, pa.Table]:
    """``runs`` and ``curves`` of a format-``fmt`` result set in the current format. ``labels``
    returns {variant hash: today's label} from the stored spec, or None when it no longer loads
    (the labels are then kept; replay and audit say why the spec does not load)."""
    if fmt >= FORMAT:
        return runs, curves
    keys = _varied(runs)
    relabel = labels()
    runs = _rename(runs, keys, relabel)
    curves = _rename(curves, set(), relabel, runs)
    return runs, curves


def _varied(runs: pa.Table) -> set[str]:
    keys = set()
    for text in set(runs.column("changes").to_pylist()) if "changes" in runs.column_names else ():
        keys |= set(json.loads(text))
    return {k for k in keys if k in runs.column_names}


def _rename(table: pa.Table, keys: set[str], relabel: dict | None, runs: pa.Table | None = None) -> pa.Table:
    cols, names = [], []
    for name in table.column_names:
        col = table.column(name)
        if name in keys:
            col = _key_values(name, col)
        elif name == "changes":
            col = _strings(col, _changes)
        elif name == "status":
            col = _strings(col, lambda s: STATUS.get(s, s))
        elif name == "variant_label" and relabel:
            from runtime.store import column
            if runs is None:   # the runs table: by variant hash
                col = column([relabel.get(h, o) for h, o in zip(table.column("variant_hash").to_pylist(),
                                                                col.to_pylist())], pa.string())
            else:              # the curves table: by run id, from the runs table already migrated
                by_run = dict(zip(runs.column("run_id").to_pylist(), runs.column("variant_label").to_pylist()))
                col = column([by_run.get(r, o) for r, o in zip(table.column("run_id").to_pylist(),
                                                              col.to_pylist())], pa.string())
        cols.append(col)
        names.append(column_name(name, keys))
    return pa.Table.from_arrays(cols, names=names).replace_schema_metadata(table.schema.metadata)
