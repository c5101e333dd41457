"""The spec language: pydantic models for one study.

A spec file is TOML. Each top-level table maps onto one model below; every model forbids unknown
keys and is frozen. Families with alternatives are tagged unions on ``kind``. Every default lives
here and nowhere else. This module never imports jax: it only describes and checks.

A *study* is a :class:`Spec` with an ``[ablation]`` table; ``compiler.expand`` turns it into
*variants*, each again a :class:`Spec` (no ablation, ``model.hidden`` as an explicit list).
"""

from __future__ import annotations

import math
import posixpath
import re
from typing import Annotated, ClassVar, Literal, Union

from pydantic import (BaseModel, ConfigDict, Discriminator, Field, SerializerFunctionWrapHandler, Tag, field_validator,
                      model_serializer, model_validator)

__all__ = [
    "Strict", "Study", "SyntheticData", "FileData", "Data", "NeuronBudget", "Model",
    "L2", "KL", "BCE", "Huber", "Divergence", "NoNorm", "BatchNorm", "LayerNorm", "Normalization",
    "Dropout", "Regularization", "Constant", "Exponential", "Cosine", "WarmupCosine", "Schedule",
    "SGD", "Adam", "AdamW", "RMSProp", "Optimizer", "Training", "Axis", "ListedVariant",
    "Ablation", "Spec", "METRICS", "CLASSIFICATION_GENERATORS", "REGRESSION_GENERATORS",
    "task_of", "classes_of",
]

# Per-epoch metrics a study may use as its headline, with the direction that counts as better.
METRICS: dict[str, Literal["max", "min"]] = {
    "val_accuracy": "max",
    "val_divergence": "min",
    "val_rmse": "min",
    "train_divergence": "min",
}
CLASSIFICATION_METRICS = {"val_accuracy", "val_divergence", "train_divergence"}
REGRESSION_METRICS = {"val_rmse", "val_divergence", "train_divergence"}

CLASSIFICATION_GENERATORS = ("rings", "spirals", "blobs")
REGRESSION_GENERATORS = ("friedman1", "sines")

Rate = Annotated[float, Field(ge=0.0, lt=1.0, allow_inf_nan=False)]
Positive = Annotated[float, Field(gt=0.0, allow_inf_nan=False)]
NonNegative = Annotated[float, Field(ge=0.0, allow_inf_nan=False)]
Fraction = Annotated[float, Field(ge=0.0, le=1.0, allow_inf_nan=False)]
Count = Annotated[int, Field(ge=1)]
# Large enough for any real study on one machine, small enough that a typo cannot ask for
# terabytes before the resource estimate even runs.
MAX_SAMPLES = 50_000_000
MAX_WIDTH = 65_536
MAX_EPOCHS = 100_000


class Strict(BaseModel):
    """Base of every spec model: unknown keys are errors, values are immutable, no coercion
    beyond what TOML already decided (an int may stand for a float)."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)

    # The fields a compiled program takes as traced inputs (one program serves every value);
    # every other field is structure, passed to its component as a Python value.
    knobs: ClassVar[tuple[str, ...]] = ()


# ── study ───────────────────────────────────────────────────────────────────────────────────────
class Study(Strict):
    name: Annotated[str, Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")]
    description: Annotated[str, Field(max_length=2000)] = ""
    seeds: Union[Annotated[int, Field(ge=1, le=10_000)], Annotated[list[Annotated[int, Field(ge=0, lt=2**31)]], Field(min_length=1, max_length=10_000)]] = 3
    metric: str = "val_accuracy"

    @field_validator("seeds")
    @classmethod
    def _distinct_seeds(cls, v):
        if isinstance(v, list) and len(set(v)) != len(v):
            dup = sorted({s for s in v if v.count(s) > 1})
            raise ValueError(f"seeds must be distinct (repeated: {dup})")
        return v

    @field_validator("metric")
    @classmethod
    def _known_metric(cls, v):
        if v not in METRICS:
            raise ValueError(f"unknown metric {v!r} (expected one of {', '.join(METRICS)})")
        return v

    @property
    def seed_list(self) -> list[int]:
        return list(range(self.seeds)) if isinstance(self.seeds, int) else list(self.seeds)


# ── data ────────────────────────────────────────────────────────────────────────────────────────
class SyntheticData(Strict):
    """A built-in generator. The data set itself is drawn from ``seed`` (the same for every run
    of the study); each run's train/validation split is drawn from the run's seed."""

    kind: Literal["synthetic"] = "synthetic"
    generator: Literal["rings", "spirals", "blobs", "friedman1", "sines"] = "rings"
    samples: Annotated[int, Field(ge=8, le=MAX_SAMPLES)] = 2000
    features: Annotated[int, Field(ge=1, le=4096)] = 8
    classes: Annotated[int, Field(ge=1, le=1000)] = 3
    noise: NonNegative = 0.1
    validation: Annotated[float, Field(gt=0.0, lt=1.0, allow_inf_nan=False)] = 0.25
    seed: Annotated[int, Field(ge=0, lt=2**31)] = 0

    @model_validator(mode="after")
    def _shape(self):
        # "@key: message" lines: expand.pydantic_problems locates each at its key.
        problems = []
        if self.generator == "friedman1" and self.features < 5:
            problems.append("@features: friedman1 needs features >= 5 (its target uses the first five)")
        if self.generator in ("rings", "spirals") and self.features < 2:
            problems.append(f"@features: {self.generator} needs features >= 2 (the pattern lives in the first two)")
        if self.generator in CLASSIFICATION_GENERATORS and self.classes < 2:
            problems.append(f"@classes: classes must be >= 2 for the classification generator {self.generator!r}")
        if problems:
            raise ValueError("\n".join(problems))
        return self


class FileData(Strict):
    """A table on disk (Parquet, CSV or NPZ). ``path`` is relative to the spec file's folder and
    may not leave it (no absolute path, no ``..`` climbing out): a spec reads only files beside
    or below it. A symbolic link placed there is followed; whoever placed it chose the target."""

    kind: Literal["file"]
    path: Annotated[str, Field(min_length=1, max_length=4096)]
    target: Annotated[str, Field(min_length=1)] = "y"
    features: Union[Annotated[list[str], Field(min_length=1)], None] = None
    task: Literal["classification", "regression"] = "classification"
    validation: Annotated[float, Field(gt=0.0, lt=1.0, allow_inf_nan=False)] = 0.25

    @field_validator("path")
    @classmethod
    def _suffix(cls, v):
        if not v.lower().endswith((".parquet", ".csv", ".npz")):
            raise ValueError(f"data file must end in .parquet, .csv or .npz (got {v!r})")
        if "\x00" in v:
            raise ValueError("data path contains a NUL character")
        if posixpath.isabs(v) or posixpath.normpath(v).split("/")[0] == "..":
            raise ValueError(f"data path {v!r} leaves the spec's folder; paths are relative to the spec file "
                             "and stay inside its folder (copy or link the file there)")
        return v


def _data_kind(value) -> str:
    # [data] without a kind means the built-in generators, the common case.
    return value.get("kind", "synthetic") if isinstance(value, dict) else getattr(value, "kind", "synthetic")


Data = Annotated[Union[Annotated[SyntheticData, Tag("synthetic")], Annotated[FileData, Tag("file")]],
                 Discriminator(_data_kind)]


# ── model ───────────────────────────────────────────────────────────────────────────────────────
class NeuronBudget(Strict):
    """A fixed number of hidden neurons spread evenly over ``depth`` layers."""

    neurons: Annotated[int, Field(ge=1, le=MAX_WIDTH * 16)]
    depth: Annotated[int, Field(ge=1, le=64)]

    @model_validator(mode="after")
    def _divides(self):
        if self.neurons % self.depth:
            lo = self.neurons // self.depth * self.depth
            raise ValueError(
                f"a budget of {self.neurons} neurons does not divide into {self.depth} equal layers "
                f"(try neurons = {lo} or {lo + self.depth})")
        return self

    @property
    def widths(self) -> list[int]:
        return [self.neurons // self.depth] * self.depth


def _hidden_form(value) -> str:
    return "budget" if isinstance(value, (dict, NeuronBudget)) else "widths"


class Model(Strict):
    """The network family (``kind``) and its shape."""
    kind: Literal["mlp"] = "mlp"
    hidden: Annotated[Union[Annotated[Annotated[list[Annotated[int, Field(ge=1, le=MAX_WIDTH)]], Field(max_length=64)], Tag("widths")],
                            Annotated[NeuronBudget, Tag("budget")]],
                      Discriminator(_hidden_form)] = [32, 32]
    activation: Literal["relu", "tanh", "sigmoid", "gelu", "identity"] = "relu"
    init: Literal["he_normal", "he_uniform", "glorot_normal", "glorot_uniform"] = "he_normal"

    @property
    def widths(self) -> list[int]:
        return self.hidden.widths if isinstance(self.hidden, NeuronBudget) else list(self.hidden)

    @model_serializer(mode="wrap")
    def _mlp_unwritten(self, handler: SerializerFunctionWrapHandler):
        # Specs older than the family choice were all MLPs: leaving the default family out of
        # every dump keeps their canonical JSON, hence their study, variant and structure hashes.
        out = handler(self)
        if out.get("kind") == "mlp":
            del out["kind"]
        return out


# ── divergence ──────────────────────────────────────────────────────────────────────────────────
class L2(Strict):
    """Identity output, half squared error (regression)."""
    kind: Literal["l2"]


class KL(Strict):
    """Softmax output, KL(d || y) to the (optionally smoothed) target distribution."""
    kind: Literal["kl"]
    label_smoothing: Rate = 0.0
    knobs: ClassVar[tuple[str, ...]] = ("label_smoothing",)


class BCE(Strict):
    """Sigmoid output, binary cross-entropy (two classes)."""
    kind: Literal["bce"]


class Huber(Strict):
    """Identity output, Huber loss with threshold ``delta`` (regression)."""
    kind: Literal["huber"]
    delta: Positive = 1.0
    knobs: ClassVar[tuple[str, ...]] = ("delta",)


Divergence = Annotated[Union[L2, KL, BCE, Huber], Field(discriminator="kind")]


# ── normalization ───────────────────────────────────────────────────────────────────────────────
class NoNorm(Strict):
    kind: Literal["none"]


class BatchNorm(Strict):
    """Ioffe & Szegedy 2015. ``momentum`` weights the old running statistics."""
    kind: Literal["batch"]
    momentum: Rate = 0.9
    epsilon: Positive = 1e-5
    knobs: ClassVar[tuple[str, ...]] = ("momentum", "epsilon")


class LayerNorm(Strict):
    """Ba, Kiros & Hinton 2016."""
    kind: Literal["layer"]
    epsilon: Positive = 1e-5
    knobs: ClassVar[tuple[str, ...]] = ("epsilon",)


Normalization = Annotated[Union[NoNorm, BatchNorm, LayerNorm], Field(discriminator="kind")]


# ── regularization ──────────────────────────────────────────────────────────────────────────────
class Dropout(Strict):
    rate: Rate = 0.0
    kind: Literal["inverted", "scaled", "connect"] = "inverted"
    knobs: ClassVar[tuple[str, ...]] = ("rate",)


class Regularization(Strict):
    weight_decay: Annotated[float, Field(ge=0.0, le=10.0, allow_inf_nan=False)] = 0.0
    decoupled: bool = False
    dropout: Dropout = Dropout()
    knobs: ClassVar[tuple[str, ...]] = ("weight_decay",)


# ── optimizer ───────────────────────────────────────────────────────────────────────────────────
class Constant(Strict):
    kind: Literal["constant"]


class Exponential(Strict):
    """Learning rate multiplied by ``rate`` once per epoch (smoothly, per step)."""
    kind: Literal["exponential"]
    rate: Annotated[float, Field(gt=0.0, le=1.0, allow_inf_nan=False)] = 0.97
    knobs: ClassVar[tuple[str, ...]] = ("rate",)


class Cosine(Strict):
    """Cosine decay over all training steps down to ``final_fraction`` of the base rate."""
    kind: Literal["cosine"]
    final_fraction: Fraction = 0.0
    knobs: ClassVar[tuple[str, ...]] = ("final_fraction",)


class WarmupCosine(Strict):
    """Linear warm-up from 0 over ``warmup_epochs``, then cosine decay to ``final_fraction``."""
    kind: Literal["warmup_cosine"]
    warmup_epochs: Annotated[int, Field(ge=1, le=MAX_EPOCHS)] = 1
    final_fraction: Fraction = 0.0
    knobs: ClassVar[tuple[str, ...]] = ("final_fraction",)


Schedule = Annotated[Union[Constant, Exponential, Cosine, WarmupCosine], Field(discriminator="kind")]
LearningRate = Annotated[float, Field(gt=0.0, le=1e6, allow_inf_nan=False)]


class SGD(Strict):
    kind: Literal["sgd"]
    learning_rate: LearningRate = 0.05
    momentum: Rate = 0.0
    nesterov: bool = False
    schedule: Schedule = Constant(kind="constant")
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "momentum")


class Adam(Strict):
    kind: Literal["adam"]
    learning_rate: LearningRate = 1e-3
    b1: Rate = 0.9
    b2: Rate = 0.999
    eps: Positive = 1e-8
    schedule: Schedule = Constant(kind="constant")
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "b1", "b2", "eps")


class AdamW(Adam):
    """Adam with decoupled weight decay; λ is ``regularization.weight_decay``."""
    kind: Literal["adamw"]


class RMSProp(Strict):
    kind: Literal["rmsprop"]
    learning_rate: LearningRate = 1e-3
    decay: Rate = 0.9
    eps: Positive = 1e-8
    momentum: Rate = 0.0
    schedule: Schedule = Constant(kind="constant")
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "decay", "eps", "momentum")


Optimizer = Annotated[Union[SGD, Adam, AdamW, RMSProp], Field(discriminator="kind")]


# ── training ────────────────────────────────────────────────────────────────────────────────────
class Training(Strict):
    epochs: Annotated[int, Field(ge=1, le=MAX_EPOCHS)] = 20
    batch_size: Annotated[int, Field(ge=1, le=MAX_SAMPLES)] = 64
    drop_last: bool = True


# ── ablation ────────────────────────────────────────────────────────────────────────────────────
AxisValue = Union[bool, int, float, str, list, dict]
_DOTTED_PATTERN = r"^[a-z_][a-z0-9_]*(\.[a-z_][a-z0-9_]*)+$"
_DOTTED = re.compile(_DOTTED_PATTERN)


class Axis(Strict):
    key: Annotated[str, Field(pattern=_DOTTED_PATTERN)]
    values: Annotated[list[AxisValue], Field(min_length=1, max_length=1000)]

    @field_validator("values")
    @classmethod
    def _distinct(cls, v):
        _hashable_values(v)
        seen = []
        for x in v:
            if any(_same(x, y) for y in seen):
                raise ValueError(f"value {x!r} appears twice on this axis")
            seen.append(x)
        return v


class ListedVariant(Strict):
    label: Annotated[str, Field(min_length=1, max_length=200)]
    set: Annotated[dict[str, AxisValue], Field(min_length=1)]

    @field_validator("set")
    @classmethod
    def _keys(cls, v):
        for k in v:
            if not _DOTTED.match(k):
                raise ValueError(f"{k!r} is not a dotted key such as 'optimizer.learning_rate'")
        _hashable_values(list(v.values()))
        return v


class Ablation(Strict):
    mode: Literal["grid", "one_at_a_time", "list"] = "grid"
    axis: Annotated[list[Axis], Field(max_length=32)] = []
    variant: Annotated[list[ListedVariant], Field(max_length=10_000)] = []
    include_base: bool = True

    @model_validator(mode="after")
    def _fits_mode(self):
        if self.mode == "list":
            if not self.variant:
                raise ValueError("mode 'list' needs [[ablation.variant]] tables (label = ..., set = {...})")
            if self.axis:
                raise ValueError("mode 'list' takes [[ablation.variant]] tables, not [[ablation.axis]]; "
                                 "use mode = 'grid' or 'one_at_a_time' for axes")
            labels = [v.label for v in self.variant]
            dup = sorted({x for x in labels if labels.count(x) > 1})
            if dup:
                raise ValueError(f"variant labels must be distinct (repeated: {dup})")
        else:
            if not self.axis:
                raise ValueError(f"mode {self.mode!r} needs at least one [[ablation.axis]] (key = ..., values = [...])")
            if self.variant:
                raise ValueError(f"mode {self.mode!r} takes [[ablation.axis]] tables; "
                                 "[[ablation.variant]] tables need mode = 'list'")
            keys = [a.key for a in self.axis]
            dup = sorted({k for k in keys if keys.count(k) > 1})
            if dup:
                raise ValueError(f"each key may have one axis (repeated: {dup})")
        return self


# ── the whole spec ──────────────────────────────────────────────────────────────────────────────
def task_of(data: SyntheticData | FileData) -> Literal["classification", "regression"]:
    if isinstance(data, FileData):
        return data.task
    return "classification" if data.generator in CLASSIFICATION_GENERATORS else "regression"


def classes_of(data: SyntheticData | FileData) -> int | None:
    """Number of classes of a synthetic classification set; None for regression or file data
    (read from the file at build time)."""
    if isinstance(data, SyntheticData) and task_of(data) == "classification":
        return data.classes
    return None


class Spec(Strict):
    study: Study
    data: Data = SyntheticData()
    model: Model = Model()
    divergence: Divergence = KL(kind="kl")
    normalization: Normalization = NoNorm(kind="none")
    regularization: Regularization = Regularization()
    optimizer: Optimizer = SGD(kind="sgd")
    training: Training = Training()
    ablation: Union[Ablation, None] = None

    @model_validator(mode="after")
    def _coherent(self):
        # Cross-section rules. Each problem names the key to change; expand.pydantic_problems
        # reads the "@key: message" lines back into separate, located problems.
        problems: list[tuple[str, str]] = []
        task = task_of(self.data)
        kind = self.divergence.kind
        if task == "regression" and kind in ("kl", "bce"):
            problems.append(("divergence.kind", f"{kind!r} needs class targets but the data is a regression task; "
                                                "use 'l2' or 'huber'"))
        if task == "classification" and kind in ("l2", "huber"):
            problems.append(("divergence.kind", f"{kind!r} needs real-valued targets but the data is a classification "
                                                "task; use 'kl' (or 'bce' for two classes)"))
        n_classes = classes_of(self.data)
        if kind == "bce" and n_classes is not None and n_classes != 2:
            problems.append(("divergence.kind", f"'bce' is binary but data.classes = {n_classes}; "
                                                "use 'kl' or set data.classes = 2"))
        metric = self.study.metric
        allowed = CLASSIFICATION_METRICS if task == "classification" else REGRESSION_METRICS
        if metric not in allowed:
            problems.append(("study.metric", f"{metric!r} does not exist for a {task} task "
                                             f"(expected one of {', '.join(sorted(allowed))})"))
        if self.optimizer.kind == "adamw" and not self.regularization.decoupled:
            problems.append(("optimizer.kind", "'adamw' applies weight decay decoupled from the gradient; "
                                               "set regularization.decoupled = true (λ is regularization.weight_decay) "
                                               "or use 'adam'"))
        if isinstance(self.data, SyntheticData):
            n_train = train_size(self.data.samples, self.data.validation)
            if n_train < 1 or n_train == self.data.samples:
                problems.append(("data.validation", f"{self.data.validation} leaves no rows on one side of the "
                                                    f"split of {self.data.samples} samples"))
            elif self.training.batch_size > n_train:
                problems.append(("training.batch_size", f"{self.training.batch_size} exceeds the {n_train} training "
                                                        f"samples ({self.data.samples} × (1 − {self.data.validation})); "
                                                        f"use at most {n_train}"))
        sched = self.optimizer.schedule
        if isinstance(sched, WarmupCosine) and sched.warmup_epochs >= self.training.epochs:
            problems.append(("optimizer.schedule.warmup_epochs", f"{sched.warmup_epochs} must be below "
                                                                 f"training.epochs = {self.training.epochs}"))
        if problems:
            raise ValueError("\n".join(f"@{key}: {msg}" for key, msg in problems))
        return self


def train_size(samples: int, validation: float) -> int:
    """Rows in the training split: the validation share is rounded, the rest trains."""
    return samples - int(round(samples * validation))


_SAFE_INT = 2**53 - 1


def _hashable_values(values: list) -> None:
    """Axis and variant values reach the study hash before any field checks them, and canonical
    JSON (RFC 8785) has no NaN, no infinities and no integers beyond ±(2**53 − 1)."""
    for x in values:
        if isinstance(x, float) and not math.isfinite(x):
            raise ValueError(f"{x!r} is not a usable value (no setting accepts NaN or infinity)")
        if isinstance(x, int) and not isinstance(x, bool) and abs(x) > _SAFE_INT:
            raise ValueError(f"{x} is too large (integers must be within ±(2**53 − 1))")
        if isinstance(x, (list, dict)):
            _hashable_values(list(x.values()) if isinstance(x, dict) else x)


def _same(a, b) -> bool:
    """Equality that tells 1 from 1.0 from True: axis values are typed."""
    if type(a) is not type(b):
        return False
    if isinstance(a, float) and math.isnan(a):
        return math.isnan(b)
    return a == b
