"""The component table: one row per registered kind of every component family.

A row is the kind's section as a spec writes it, with a non-default value for every field that
has one to change (a field left at its default would hide a factory falling back on its own), and
optionally ``reference``: an outside formula the shared tests compare the component with, its
source named beside it. ``also`` holds what the rest of the spec must say for the kind to be valid
(the kind's own ``problems`` ask for it). ``shapes`` are the example shapes a network family is
tested on (a small one and one wide enough for XLA's operation count to be mostly its
multiply-accumulates); a family that needs shaped examples (``conv``: images) gets shaped data
(glyphs) in :func:`bases` too.

``test_components.py`` checks every row alike (registry ↔ schema both ways, shapes, dtypes, jit,
progress on a small problem, declared facts); ``test_knobs.py`` trains specs composed from the rows
(:func:`bases`). Adding a kind is adding its row here: both fail until it has one.
"""

from __future__ import annotations

import copy
import typing
from typing import Callable, NamedTuple

import numpy as np

from compiler import divergences, model, normalization, optimizers, regularization, spec
from compiler.paths import models_in


class Row(NamedTuple):
    family: str
    section: dict
    reference: Callable | None = None
    also: dict = {}
    shapes: tuple[tuple[int, ...], tuple[int, ...]] = ((6,), (32,))

    @property
    def shaped(self) -> bool:
        """Whether the kind needs examples with positions and channels (not vectors)."""
        return len(self.shapes[0]) > 1

    @property
    def kind(self) -> str:
        return self.section["kind"]

    @property
    def id(self) -> str:
        return f"{self.family}:{self.kind}"


# The family registries and the spec section (its schema annotation) each is built from.
FAMILIES: dict[str, tuple[object, dict]] = {
    "model": (spec.Network, model.FAMILIES),
    "divergence": (spec.Divergence, divergences.REGISTRY),
    "normalization": (spec.Normalization, normalization.REGISTRY),
    "regularization.dropout": (spec.Dropout, regularization.REGISTRY),
    "optimizer": (spec.Optimizer, optimizers.REGISTRY),
    "optimizer.schedule": (spec.Schedule, optimizers.SCHEDULES),
}


# bases() cycles every family's rows in this order, so the order decides which kinds meet: the
# conv row (2nd of 2 models: bases 1 and 3) needs a classification divergence there (glyphs data
# are classes), hence kl and bce 2nd and 4th among the divergences, the regression ones 1st and 3rd.
ROWS: list[Row] = [
    Row("model", {"kind": "mlp", "hidden": [5, 4], "activation": "tanh", "init": "glorot_uniform"}),
    # Valid padding: XLA counts every multiply-accumulate of the convolution (none on padding
    # zeros), as the declared cost does; tanh, not gelu: XLA counts many FLOPs for the exact
    # gelu's erf, which outweigh this small block's products (measured on the wide shape: up to
    # 2.1× the MACs' 2 FLOPs with gelu, 1.3× with tanh). A second copy of the block still fits
    # the 8×8 image.
    Row("model", {"kind": "conv", "blocks": [{"channels": 3, "kernel": 2, "padding": "valid", "pool": 2}],
                  "pooling": "average", "hidden": [4], "activation": "tanh", "init": "he_uniform"},
        shapes=((8, 8, 2), (16, 16, 3))),
    # ½‖z − d‖² summed over the targets (common practice: the definition)
    Row("divergence", {"kind": "l2"}, reference=lambda z, d: 0.5 * np.sum(np.square(z - d), axis=-1)),
    Row("divergence", {"kind": "kl", "label_smoothing": 0.1}),
    Row("divergence", {"kind": "huber", "delta": 0.05}),
    Row("divergence", {"kind": "bce"}),
    Row("normalization", {"kind": "batch", "momentum": 0.8, "epsilon": 1e-3}),
    Row("normalization", {"kind": "layer", "epsilon": 1e-4}),
    Row("normalization", {"kind": "none"}),
    Row("regularization.dropout", {"kind": "inverted", "rate": 0.1}),
    Row("regularization.dropout", {"kind": "dropconnect", "rate": 0.2}),
    Row("regularization.dropout", {"kind": "scaled", "rate": 0.3}),
    Row("regularization.dropout", {"kind": "spatial", "rate": 0.25}),
    Row("optimizer", {"kind": "sgd", "learning_rate": 0.1, "momentum": 0.9, "nesterov": True}),
    Row("optimizer", {"kind": "adam", "learning_rate": 0.01, "b1": 0.8, "b2": 0.99, "eps": 1e-7}),
    Row("optimizer", {"kind": "rmsprop", "learning_rate": 0.01, "decay": 0.8, "eps": 1e-6, "momentum": 0.5}),
    Row("optimizer", {"kind": "adamw", "learning_rate": 0.01, "b1": 0.85, "b2": 0.98, "eps": 1e-6},
        also={"regularization": {"decoupled": True}}),
    Row("optimizer.schedule", {"kind": "warmup_cosine", "warmup_epochs": 2, "final_fraction": 0.2}),
    Row("optimizer.schedule", {"kind": "cosine", "final_fraction": 0.1}),
    Row("optimizer.schedule", {"kind": "exponential", "rate": 0.9}),
    Row("optimizer.schedule", {"kind": "constant"}),
]


def kinds(annotation) -> set[str]:
    """The kinds a family's schema declares."""
    return {k for m in models_in(annotation) for k in typing.get_args(m.model_fields["kind"].annotation)}


def schema_class(family: str, kind: str):
    """The schema class of ``kind`` in ``family``."""
    annotation = FAMILIES[family][0]
    return next(m for m in models_in(annotation) if kind in typing.get_args(m.model_fields["kind"].annotation))


def _data_for(divergence: dict, shaped: Row | None) -> dict:
    """A small synthetic data set of the task the divergence declares; glyphs of the row's
    shape when a ``shaped`` row needs them."""
    declared = schema_class("divergence", divergence["kind"])
    if shaped is not None:
        if declared.task == "regression":
            raise ValueError(f"components.bases() pairs {shaped.id} (glyphs: class labels) with the regression "
                             f"divergence {divergence['kind']!r}; reorder ROWS (see the comment above it)")
        return {"generator": "glyphs", "samples": 64, "shape": list(shaped.shapes[0]),
                "classes": declared.classes or 3}
    if declared.task == "regression":
        return {"generator": "friedman1", "samples": 64, "features": 5}
    return {"generator": "spirals", "samples": 64, "features": 3, "classes": declared.classes or 3}


def _merge(into: dict, extra: dict) -> None:
    for key, value in extra.items():
        if isinstance(value, dict) and isinstance(into.get(key), dict):
            _merge(into[key], value)
        else:
            into[key] = copy.deepcopy(value)


def bases() -> dict[str, dict]:
    """Specs (without ``[study]``) between which every row of the table is used: the i-th takes
    the i-th row of every family (cycling through the shorter ones), its data set of the task its
    divergence declares (glyphs when a row needs shaped examples), and the weight decay in the
    loss or decoupled in turn."""
    by_family = {family: [r for r in ROWS if r.family == family] for family in FAMILIES}
    count = max(len(rows) for rows in by_family.values())
    out = {}
    for i in range(count):
        raw: dict = {"regularization": {"weight_decay": 1e-3, "decoupled": bool(i % 2)},
                     "training": {"epochs": 3, "batch_size": 16, "drop_last": bool(i % 2)}}
        chosen = [rows[i % len(rows)] for rows in by_family.values()]
        for row in chosen:
            node = raw
            *head, last = row.family.split(".")
            for part in head:
                node = node.setdefault(part, {})
            _merge(node.setdefault(last, {}), row.section)
        for row in chosen:
            _merge(raw, row.also)
        raw["data"] = _data_for(raw["divergence"], next((row for row in chosen if row.shaped), None))
        out["-".join(row.kind for row in chosen)] = raw
    return out
