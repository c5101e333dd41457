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
import typing
from typing import Annotated, ClassVar, Literal, Union

from pydantic import (BaseModel, ConfigDict, Discriminator, Field, SerializerFunctionWrapHandler, Tag, field_validator,
                      model_serializer, model_validator)

from compiler import shapes

__all__ = [
    "Strict", "Study", "SyntheticData", "FileData", "Data", "NeuronBudget", "Model", "ConvBlock", "ChannelBudget",
    "ConvModel", "Network",
    "DivergenceSection", "L2", "KL", "BCE", "Huber", "Divergence", "NoNorm", "BatchNorm", "LayerNorm", "Normalization",
    "Dropout", "Regularization", "Constant", "Exponential", "Cosine", "WarmupCosine", "Schedule",
    "SGD", "Adam", "AdamW", "RMSProp", "Optimizer", "Training", "Axis", "ListedVariant",
    "TunedKnob", "Tuning", "Ablation", "Spec", "METRICS", "PER_CLASS_METRICS", "RECALL", "MACRO_F1",
    "CLASSIFICATION_GENERATORS", "task_of", "classes_of", "example_shape", "section_problems", "train_size",
    "split_sizes", "class_of_metric", "direction", "known_metrics", "class_metrics", "metrics_of", "metric_problem",
    "spelled_metrics",
]

# The metric names, in one place. A classifier's evaluation computes, from the predictions its
# accuracy counts, the recall of each class k (RECALL + "<k>") and the F1 score averaged over
# classes (MACRO_F1); they are named here without the split, whose prefix ("val_") the evaluating
# code adds.
RECALL, MACRO_F1 = "recall_", "macro_f1"

# Per-epoch metrics a study may use as its headline, with the direction that counts as better.
METRICS: dict[str, Literal["max", "min"]] = {
    "val_accuracy": "max",
    f"val_{MACRO_F1}": "max",
    "val_divergence": "min",
    "val_rmse": "min",
    "train_divergence": "min",
}
# Metrics with one column per class: the prefix, then the class index k (0 … classes − 1).
PER_CLASS_METRICS: dict[str, Literal["max", "min"]] = {f"val_{RECALL}": "max"}
CLASSIFICATION_METRICS = {"val_accuracy", "val_divergence", "train_divergence", f"val_{MACRO_F1}"}
REGRESSION_METRICS = {"val_rmse", "val_divergence", "train_divergence"}


def class_of_metric(name: str) -> tuple[str, int] | None:
    """(prefix, class index) of a per-class metric name such as ``val_recall_2``; None otherwise.
    The index is written as Python prints it (no sign, no leading zero), so each class has one
    name."""
    for prefix in PER_CLASS_METRICS:
        k = name[len(prefix):]
        if name.startswith(prefix) and k.isascii() and k.isdigit() and str(int(k)) == k:
            return prefix, int(k)
    return None


def direction(metric: str) -> Literal["max", "min"] | None:
    """The direction that counts as better for a metric name; None for a name that is no metric."""
    if metric in METRICS:
        return METRICS[metric]
    per_class = class_of_metric(metric)
    return PER_CLASS_METRICS[per_class[0]] if per_class else None


def known_metrics() -> list[str]:
    """Every metric name, a per-class one as ``<prefix><k>`` (k a class index)."""
    return [*METRICS, *(f"{prefix}<k>" for prefix in PER_CLASS_METRICS)]


def class_metrics(classes: int) -> tuple[str, ...]:
    """The metrics a classifier of ``classes`` classes computes beyond accuracy, in stored order."""
    return (f"val_{MACRO_F1}", *(f"{prefix}{k}" for prefix in PER_CLASS_METRICS for k in range(classes)))


def metrics_of(task: str, classes: int | None) -> list[str]:
    """The headline metrics a study of ``task`` may use; per-class ones spelled out for
    ``classes`` classes, or as ``<prefix><k>`` while the class count is unknown (a data file's
    is known once it is read)."""
    if task == "regression":
        return [m for m in METRICS if m in REGRESSION_METRICS]
    fixed = [m for m in METRICS if m in CLASSIFICATION_METRICS]
    if classes is None:
        return fixed + [f"{prefix}<k>" for prefix in PER_CLASS_METRICS]
    return fixed + [m for m in class_metrics(classes) if m not in fixed]


def spelled_metrics(names: list[str]) -> str:
    """Metric names as text, more than three per-class ones of a prefix as "first … last"."""
    for prefix in PER_CLASS_METRICS:
        mine = [i for i, n in enumerate(names) if (c := class_of_metric(n)) and c[0] == prefix]
        if len(mine) > 3:
            ks = sorted(class_of_metric(names[i])[1] for i in mine)
            names = [f"{prefix}{ks[0]} … {prefix}{ks[-1]}" if i == mine[0] else n for i, n in enumerate(names)
                     if i == mine[0] or i not in mine]
    return ", ".join(names)


def metric_problem(metric: str, task: str, classes: int | None, classes_from: str = "data.classes") -> str | None:
    """Why ``metric`` is not one of a study's metrics, with the ones it has; None when it is.
    ``classes_from`` says where the class count comes from."""
    per_class = class_of_metric(metric)
    allowed = CLASSIFICATION_METRICS if task == "classification" else REGRESSION_METRICS
    if metric not in allowed and not (per_class and task == "classification"):
        expected = spelled_metrics(metrics_of(task, classes))
        return f"{metric!r} does not exist for a {task} task (expected one of {expected})"
    if per_class and classes is not None and per_class[1] >= classes:
        prefix = per_class[0]
        return (f"{metric!r} names class {per_class[1]} but there are {classes} classes (0 … {classes - 1}: "
                f"{classes_from}); use {prefix}0 … {prefix}{classes - 1}")
    return None


CLASSIFICATION_GENERATORS = ("rings", "spirals", "blobs", "glyphs")
# The generators that draw shaped examples (images, signals), and the shape they draw by default.
SHAPED_GENERATORS = {"glyphs": (12, 12, 1)}

Rate = Annotated[float, Field(ge=0.0, lt=1.0, allow_inf_nan=False)]
Positive = Annotated[float, Field(gt=0.0, allow_inf_nan=False)]
NonNegative = Annotated[float, Field(ge=0.0, allow_inf_nan=False)]
Fraction = Annotated[float, Field(ge=0.0, le=1.0, allow_inf_nan=False)]
# data.standardize came after study hashes were fixed: at its default (true) it is left out of
# every dump, hence of the canonical JSON, so specs written before it keep their study hash.
Standardize = Annotated[bool, Field(exclude_if=lambda v: v is True)]
# data.test too: at 0 (no test split) it is left out of every dump, so older hashes hold.
TestShare = Annotated[float, Field(ge=0.0, lt=1.0, allow_inf_nan=False, exclude_if=lambda v: v == 0)]
# Large enough for any real study on one machine, small enough that a typo cannot ask for
# terabytes before the resource estimate even runs.
MAX_SAMPLES = 50_000_000
MAX_WIDTH = 65_536
MAX_EPOCHS = 100_000
# Left out of every dump while unset, so specs written before shapes existed keep their hashes.
Shape = Annotated[Union[Annotated[list[Annotated[int, Field(ge=1, le=MAX_WIDTH)]], Field(min_length=1, max_length=3)], None],
                  Field(exclude_if=lambda v: v is None)]


class Strict(BaseModel):
    """Base of every spec model: unknown keys are errors, values are immutable, no coercion
    beyond what TOML already decided (an int may stand for a float)."""

    # Attribute docstrings become the keys' descriptions in `lesion schema` (editors show them).
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, use_attribute_docstrings=True)

    # The fields a compiled program takes as traced inputs (one program serves every value);
    # every other field is part of the program key, passed to its component as a Python value.
    knobs: ClassVar[tuple[str, ...]] = ()

    def problems(self, spec: "Spec") -> list[tuple[str, str]]:
        """This section's own rules against the rest of ``spec``: (key below the section,
        message) pairs. ``Spec`` only collects them, so a rule lives with the component it is
        about and a new component brings its own."""
        return []


def section_problems(section: Strict, spec: "Spec", prefix: str = "") -> list[tuple[str, str]]:
    """The problems of ``section`` and of every section nested in it, keys made whole."""
    out = [(prefix + key, message) for key, message in section.problems(spec)]
    for name in type(section).model_fields:
        value = getattr(section, name)
        if isinstance(value, Strict):
            out += section_problems(value, spec, f"{prefix}{name}.")
    return out


# ── study ───────────────────────────────────────────────────────────────────────────────────────
class Study(Strict):
    """What the study is called, how many seeds each variant runs, and the metric that decides."""

    name: Annotated[str, Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")]
    """Names the result set folder (<name>-<first 12 hex of the study hash>)."""
    description: Annotated[str, Field(max_length=2000)] = ""
    """Free text for people; it is part of the study hash."""
    seeds: Union[Annotated[int, Field(ge=1, le=10_000)], Annotated[list[Annotated[int, Field(ge=0, lt=2**31)]], Field(min_length=1, max_length=10_000)]] = 3
    """A count n (seeds 0 … n−1) or a list of distinct seeds; every variant runs once per seed."""
    metric: str = "val_accuracy"
    """Headline metric, summarized by `lesion show` and compared by `lesion diff`; a classifier's also val_macro_f1 and val_recall_<k> (recall of class k)."""
    # Left out of the study's JSON while unset: a new optional key dumped as null would change the
    # hash of every existing spec, and with it the folder its results are stored in.
    margin: Annotated[Union[Positive, None], Field(exclude_if=lambda v: v is None)] = None
    """Differences inside ±margin (in the metric's units) do not matter: `lesion diff` can then call a comparison equivalent."""

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
        if direction(v) is None:
            raise ValueError(f"unknown metric {v!r} (expected one of {', '.join(known_metrics())}; <k> a class index)")
        return v

    @property
    def seed_list(self) -> list[int]:
        return list(range(self.seeds)) if isinstance(self.seeds, int) else list(self.seeds)

    def problems(self, spec):
        classes = classes_of(spec.data)
        wrong = metric_problem(self.metric, task_of(spec.data), classes, f"data.classes = {classes}")
        return [] if wrong is None else [("metric", wrong)]


# ── data ────────────────────────────────────────────────────────────────────────────────────────
class SyntheticData(Strict):
    """A built-in generator. The data set itself is drawn from ``seed`` (the same for every run
    of the study); each run's train/validation split is drawn from the run's seed."""

    kind: Literal["synthetic"] = "synthetic"
    """A built-in generator (the default when kind is left out)."""
    generator: Literal["rings", "spirals", "blobs", "glyphs", "friedman1", "sines"] = "rings"
    """rings, spirals, blobs: classification; glyphs: classification of images or signals (data.shape); friedman1, sines: regression."""
    samples: Annotated[int, Field(ge=8, le=MAX_SAMPLES)] = 2000
    """Rows generated, training and validation together."""
    features: Annotated[int, Field(ge=1, le=4096)] = 8
    """Input columns (the pattern lives in the first few; the rest is noise)."""
    classes: Annotated[int, Field(ge=1, le=1000)] = 3
    """Classes of a classification generator."""
    noise: NonNegative = 0.1
    """Standard deviation of the noise added by the generator."""
    validation: Annotated[float, Field(gt=0.0, lt=1.0, allow_inf_nan=False)] = 0.25
    """Share of the rows held out for validation."""
    seed: Annotated[int, Field(ge=0, lt=2**31)] = 0
    """Seed of the data set itself; the split comes from each run's seed."""
    test: TestShare = 0.0
    """Share of the rows held out for testing, apart from training and validation (0: no test split); test scores are stored once per run and never used for a choice."""
    standardize: Standardize = True
    """Standardize the inputs per run on its training rows (mean 0, sd 1; targets never); false feeds them as they are."""
    shape: Shape = None
    """glyphs: one example's shape, channels last: [height, width, channels] (images, default [12, 12, 1]) or [length, channels] (signals)."""

    @model_validator(mode="after")
    def _shape(self):
        # "@key: message" lines: problems.pydantic_problems locates each at its key.
        problems = []
        if self.shape is not None and self.generator not in SHAPED_GENERATORS:
            problems.append(f"@shape: the {self.generator!r} generator draws vectors of data.features values; "
                            "data.shape applies to the glyphs generator and to files")
        if self.generator == "glyphs" and self.shape is not None and (
                len(self.shape) < 2 or min(self.shape[:-1]) < 4 or self.shape[-1] > 16):
            problems.append(f"@shape: glyphs draws [height, width, channels] or [length, channels] with every "
                            f"spatial size >= 4 and at most 16 channels (got {self.shape})")
        if self.generator == "friedman1" and self.features < 5:
            problems.append("@features: friedman1 needs features >= 5 (its target uses the first five)")
        if self.generator in ("rings", "spirals") and self.features < 2:
            problems.append(f"@features: {self.generator} needs features >= 2 (the pattern lives in the first two)")
        if self.generator in CLASSIFICATION_GENERATORS and self.classes < 2:
            problems.append(f"@classes: classes must be >= 2 for the classification generator {self.generator!r}")
        if problems:
            raise ValueError("\n".join(problems))
        return self

    @property
    def training_rows(self) -> tuple[int, str] | None:
        """Rows of the training split and how they come about, when known from the spec alone
        (a file's rows are counted where it is read, in ``compiler.data``)."""
        if self.problems(None):
            return None
        share = f"1 − {self.validation}" + (f" − {self.test}" if self.test else "")
        return train_size(self.samples, self.validation, self.test), f"{self.samples} × ({share})"

    def problems(self, spec):
        return [(key.removeprefix("data."), message)
                for key, message in split_problems(self.samples, self.validation, self.test, f"{self.samples} samples")]


class FileData(Strict):
    """A table on disk (Parquet, CSV or NPZ). ``path`` is relative to the spec file's folder and
    may not leave it (no absolute path, no ``..`` climbing out, checked here; no symbolic link
    leading out, checked by ``compiler.data`` where the file is opened): a spec reads only files
    beside or below it."""

    kind: Literal["file"]
    """A table on disk."""
    path: Annotated[str, Field(min_length=1, max_length=4096)]
    """Parquet, CSV or NPZ file, relative to the spec file's folder and inside it."""
    target: Annotated[str, Field(min_length=1)] = "y"
    """Column (or NPZ array) holding the target."""
    features: Union[Annotated[list[str], Field(min_length=1)], None] = None
    """Input columns; every column but the target when left out."""
    task: Literal["classification", "regression"] = "classification"
    """classification: integer class labels; regression: real-valued target."""
    validation: Annotated[float, Field(gt=0.0, lt=1.0, allow_inf_nan=False)] = 0.25
    """Share of the rows held out for validation."""
    test: TestShare = 0.0
    """Share of the rows held out for testing, apart from training and validation (0: no test split); test scores are stored once per run and never used for a choice."""
    standardize: Standardize = True
    """Standardize the inputs per run on its training rows (mean 0, sd 1; targets never); false feeds them as they are."""
    shape: Shape = None
    """One example's shape, channels last (e.g. [8, 8, 1]): the feature values of a row, in order, are reshaped into it. Left out: an NPZ feature array's own shape, else a vector."""

    @field_validator("path")
    @classmethod
    def _suffix(cls, v):
        if not v.lower().endswith((".parquet", ".csv", ".npz")):
            raise ValueError(f"data file must end in .parquet, .csv or .npz (got {v!r})")
        if "\x00" in v:
            raise ValueError("data path contains a NUL character")
        if posixpath.isabs(v) or posixpath.normpath(v).split("/")[0] == "..":
            raise ValueError(f"data path {v!r} leaves the spec's folder; paths are relative to the spec file "
                             "and stay inside its folder (copy the file there)")
        return v

    training_rows: ClassVar[None] = None

    @model_validator(mode="after")
    def _target_apart(self):
        if self.features is not None and self.target in self.features:
            raise ValueError(f"@features: the target column {self.target!r} is listed among the features; "
                             "a model given its own target learns nothing (remove it from data.features)")
        return self


def _data_kind(value) -> str:
    # [data] without a kind means the built-in generators, the common case.
    return value.get("kind", "synthetic") if isinstance(value, dict) else getattr(value, "kind", "synthetic")


Data = Annotated[Union[Annotated[SyntheticData, Tag("synthetic")], Annotated[FileData, Tag("file")]],
                 Discriminator(_data_kind)]


# ── model ───────────────────────────────────────────────────────────────────────────────────────
class NeuronBudget(Strict):
    """A fixed number of hidden neurons spread evenly over ``depth`` layers."""

    neurons: Annotated[int, Field(ge=1, le=MAX_WIDTH * 16)]
    """Hidden neurons in total; must divide evenly by depth."""
    depth: Annotated[int, Field(ge=1, le=64)]
    """Number of hidden layers."""

    @model_validator(mode="after")
    def _divides(self):
        if self.neurons > MAX_WIDTH * self.depth:
            # The same limit per layer as the list form, which the budget expands to.
            need = -(-self.neurons // MAX_WIDTH)
            raise ValueError(
                f"@neurons: {self.neurons} neurons over {self.depth} layer{'s' if self.depth > 1 else ''} make layers "
                f"of {self.neurons // self.depth}, above the {MAX_WIDTH} a layer may have; "
                f"use depth >= {need} or neurons <= {MAX_WIDTH * self.depth}")
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
    """The multilayer perceptron: hidden widths, activation and weight initialization."""

    kind: Literal["mlp"] = "mlp"
    """The network family: mlp, the multilayer perceptron (the default), or conv."""
    hidden: Annotated[Union[Annotated[Annotated[list[Annotated[int, Field(ge=1, le=MAX_WIDTH)]], Field(max_length=64)], Tag("widths")],
                            Annotated[NeuronBudget, Tag("budget")]],
                      Discriminator(_hidden_form)] = [32, 32]
    """Hidden layer widths ([] is a linear model), or a budget { neurons = 96, depth = 3 }."""
    activation: Literal["relu", "tanh", "sigmoid", "gelu", "identity"] = "relu"
    """Activation of every hidden layer."""
    init: Literal["he_normal", "he_uniform", "glorot_normal", "glorot_uniform"] = "he_normal"
    """Initialization of the weight matrices (biases start at zero)."""

    @property
    def widths(self) -> list[int]:
        return self.hidden.widths if isinstance(self.hidden, NeuronBudget) else list(self.hidden)

    @property
    def hidden_layers(self) -> int:
        return len(self.widths)

    @model_serializer(mode="wrap")
    def _mlp_unwritten(self, handler: SerializerFunctionWrapHandler):
        # Specs older than the family choice were all MLPs: leaving the default family out of
        # every dump keeps their canonical JSON, hence their study, variant hashes and program keys.
        out = handler(self)
        if out.get("kind") == "mlp":
            del out["kind"]
        return out


class ConvBlock(Strict):
    """One convolution block: convolution, normalization, activation, dropout, then pooling."""

    channels: Annotated[int, Field(ge=1, le=4096)]
    """Output channels (feature maps) of the block."""
    kernel: Annotated[int, Field(ge=1, le=64)] = 3
    """Window of the convolution along every spatial axis."""
    stride: Annotated[int, Field(ge=1, le=16)] = 1
    """Step of the convolution along every spatial axis."""
    padding: Literal["same", "valid"] = "same"
    """same: zeros around the input keep its size at stride 1; valid: no padding."""
    pool: Annotated[int, Field(ge=1, le=16)] = 1
    """Pooling window (and stride) along every spatial axis after the block; 1: no pooling."""


class ChannelBudget(Strict):
    """A fixed number of channels spread evenly over ``depth`` blocks of one kind."""

    channels: Annotated[int, Field(ge=1, le=4096 * 32)]
    """Channels in total; must divide evenly by depth."""
    depth: Annotated[int, Field(ge=1, le=32)]
    """Number of convolution blocks."""
    kernel: Annotated[int, Field(ge=1, le=64)] = 3
    """Window of every block's convolution."""
    stride: Annotated[int, Field(ge=1, le=16)] = 1
    """Stride of every block's convolution."""
    padding: Literal["same", "valid"] = "same"
    """Padding of every block's convolution."""
    pool: Annotated[int, Field(ge=1, le=16)] = 1
    """Pooling window after every block; 1: no pooling."""

    @model_validator(mode="after")
    def _divides(self):
        if self.channels % self.depth:
            lo = self.channels // self.depth * self.depth
            raise ValueError(f"@channels: a budget of {self.channels} channels does not divide into {self.depth} "
                             f"equal blocks (try channels = {lo or self.depth} or {lo + self.depth})")
        if self.channels // self.depth > 4096:
            raise ValueError(f"@channels: {self.channels} channels over {self.depth} blocks make blocks of more than "
                             f"4096 channels; use depth >= {-(-self.channels // 4096)}")
        return self

    @property
    def blocks(self) -> list[ConvBlock]:
        return [ConvBlock(channels=self.channels // self.depth, kernel=self.kernel, stride=self.stride,
                          padding=self.padding, pool=self.pool)] * self.depth


def _blocks_form(value) -> str:
    return "budget" if isinstance(value, (dict, ChannelBudget)) else "blocks"


class ConvModel(Strict):
    """A convolutional network: convolution blocks, then dense hidden layers, then the output."""

    kind: Literal["conv"]
    """The network family: conv, a convolutional network (1-D or 2-D by the data's shape)."""
    blocks: Annotated[Union[Annotated[Annotated[list[ConvBlock], Field(min_length=1, max_length=32)], Tag("blocks")],
                            Annotated[ChannelBudget, Tag("budget")]],
                      Discriminator(_blocks_form)] = [ConvBlock(channels=16, pool=2), ConvBlock(channels=32, pool=2)]
    """Convolution blocks in order ([{ channels = 16, kernel = 3, pool = 2 }, …]), or a budget { channels = 48, depth = 3 }."""
    pooling: Literal["max", "average"] = "max"
    """How a block's pool window is summarized."""
    hidden: Annotated[list[Annotated[int, Field(ge=1, le=MAX_WIDTH)]], Field(max_length=64)] = []
    """Widths of the dense hidden layers after the flattened feature maps ([]: straight to the output)."""
    activation: Literal["relu", "tanh", "sigmoid", "gelu", "identity"] = "relu"
    """Activation of every block and hidden layer."""
    init: Literal["he_normal", "he_uniform", "glorot_normal", "glorot_uniform"] = "he_normal"
    """Initialization of the kernels and weight matrices (biases start at zero)."""

    @property
    def widths(self) -> list[int]:
        return list(self.hidden)

    @property
    def resolved_blocks(self) -> list[ConvBlock]:
        return self.blocks.blocks if isinstance(self.blocks, ChannelBudget) else list(self.blocks)

    @property
    def hidden_layers(self) -> int:
        return len(self.resolved_blocks) + len(self.hidden)

    def problems(self, spec):
        # A file without data.shape is checked where its arrays are read (compiler.model).
        shape = example_shape(spec.data)
        wrong = None if shape is None else shapes.misfit(shape, self.resolved_blocks)
        if wrong is None:
            return []
        index, message = wrong
        if index is None:
            return [("kind", f"'conv' {message}; set data.shape (a file) or use generator = 'glyphs', "
                             "or use kind = 'mlp'")]
        if isinstance(self.blocks, ChannelBudget):
            return [("blocks.depth", f"block {index + 1} of {self.blocks.depth}: {message}")]
        return [(f"blocks.{index}", message)]


def _model_kind(value) -> str:
    # [model] without a kind is the multilayer perceptron, as every spec before the families was.
    return value.get("kind", "mlp") if isinstance(value, dict) else getattr(value, "kind", "mlp")


Network = Annotated[Union[Annotated[Model, Tag("mlp")], Annotated[ConvModel, Tag("conv")]], Discriminator(_model_kind)]


# ── divergence ──────────────────────────────────────────────────────────────────────────────────
class DivergenceSection(Strict):
    """What every divergence declares about itself, so that the spec check, the data loader, the
    resource guard and the compiler ask it instead of knowing kinds: the task its targets belong
    to, the number of classes it is defined for (None: any) and its output width."""

    task: ClassVar[Literal["classification", "regression"]]
    classes: ClassVar[int | None] = None

    def outputs(self, classes: int | None, targets: int | None) -> int:
        """Output units the network needs for ``classes`` classes or ``targets`` target columns."""
        return classes if self.task == "classification" else targets

    def class_problem(self, classes: int, found: str) -> str | None:
        """Why ``classes`` classes (``found`` says where they were counted) do not suit it."""
        if self.classes is None or classes == self.classes:
            return None
        what = "binary" if self.classes == 2 else f"defined for {self.classes} classes"
        return f"{self.kind!r} is {what} but {found}; use {_divergences_for('classification', classes)}"

    def problems(self, spec):
        task = task_of(spec.data)
        if task != self.task:
            needs = "class targets" if self.task == "classification" else "real-valued targets"
            return [("kind", f"{self.kind!r} needs {needs} but the data is a {task} task; "
                             f"use {_divergences_for(task, classes_of(spec.data))}")]
        classes = classes_of(spec.data)
        problem = None if classes is None else self.class_problem(classes, f"data.classes = {classes}")
        return [] if problem is None else [("kind", problem)]


class L2(DivergenceSection):
    """Identity output, half squared error (regression)."""
    kind: Literal["l2"]
    """Identity output, half squared error."""
    task: ClassVar = "regression"


class KL(DivergenceSection):
    """Softmax output, KL(d || y) to the (optionally smoothed) target distribution."""
    kind: Literal["kl"]
    """Softmax output, KL divergence to the target distribution."""
    label_smoothing: Rate = 0.0
    """Share of the target probability spread evenly over all classes."""
    knobs: ClassVar[tuple[str, ...]] = ("label_smoothing",)
    task: ClassVar = "classification"


class BCE(DivergenceSection):
    """Sigmoid output, binary cross-entropy (two classes)."""
    kind: Literal["bce"]
    """Sigmoid output, binary cross-entropy."""
    task: ClassVar = "classification"
    classes: ClassVar = 2

    def outputs(self, classes, targets):
        return 1


class Huber(DivergenceSection):
    """Identity output, Huber loss with threshold ``delta`` (regression)."""
    kind: Literal["huber"]
    """Identity output, Huber loss."""
    delta: Positive = 1.0
    """Error at which the loss turns from quadratic to linear."""
    knobs: ClassVar[tuple[str, ...]] = ("delta",)
    task: ClassVar = "regression"


Divergence = Annotated[Union[L2, KL, BCE, Huber], Field(discriminator="kind")]


def _divergences_for(task: str, classes: int | None) -> str:
    """The divergences to suggest for a task with ``classes`` classes (None: not known yet)."""
    fits, others = [], []
    for member in typing.get_args(typing.get_args(Divergence)[0]):
        if member.task != task:
            continue
        kind = repr(typing.get_args(member.model_fields["kind"].annotation)[0])
        if member.classes is None:
            fits.append(kind)
        elif classes is None or classes == member.classes:
            others.append(f"{kind} for {member.classes} classes")
    named = fits + others or ["another divergence"]
    return ", ".join(named[:-1]) + " or " + named[-1] if len(named) > 1 else named[0]


# ── normalization ───────────────────────────────────────────────────────────────────────────────
class NoNorm(Strict):
    """The affine map feeds the activation directly."""

    kind: Literal["none"]
    """No normalization."""


class BatchNorm(Strict):
    """Ioffe & Szegedy 2015. ``momentum`` weights the old running statistics."""
    kind: Literal["batch"]
    """Batch normalization."""
    momentum: Rate = 0.9
    """Weight of the old running statistics in each update."""
    epsilon: Positive = 1e-5
    """Added to the variance before the square root."""
    knobs: ClassVar[tuple[str, ...]] = ("momentum", "epsilon")


class LayerNorm(Strict):
    """Ba, Kiros & Hinton 2016."""
    kind: Literal["layer"]
    """Layer normalization."""
    epsilon: Positive = 1e-5
    """Added to the variance before the square root."""
    knobs: ClassVar[tuple[str, ...]] = ("epsilon",)


Normalization = Annotated[Union[NoNorm, BatchNorm, LayerNorm], Field(discriminator="kind")]


# ── regularization ──────────────────────────────────────────────────────────────────────────────
class Dropout(Strict):
    """Dropout on the hidden layers during training."""

    rate: Rate = 0.0
    """Probability of dropping a unit (or, for dropconnect, a weight)."""
    kind: Literal["inverted", "scaled", "dropconnect", "spatial"] = "inverted"
    """inverted: rescale while training; scaled: rescale at inference; dropconnect: DropConnect (Wan et al. 2013) on dense weights; spatial: whole channels of feature maps (inverted)."""
    knobs: ClassVar[tuple[str, ...]] = ("rate",)


class Regularization(Strict):
    """Weight decay and dropout."""

    weight_decay: Annotated[float, Field(ge=0.0, le=10.0, allow_inf_nan=False)] = 0.0
    """λ of the penalty λ/2·‖W‖² on the weights (not biases)."""
    decoupled: bool = False
    """false: decay in the loss; true: decay applied in the optimizer update."""
    dropout: Dropout = Dropout()
    """Dropout rate and kind."""
    knobs: ClassVar[tuple[str, ...]] = ("weight_decay",)


# ── optimizer ───────────────────────────────────────────────────────────────────────────────────
class Constant(Strict):
    """The learning rate stays at its base value."""

    kind: Literal["constant"]
    """The base learning rate throughout."""


class Exponential(Strict):
    """Learning rate multiplied by ``rate`` once per epoch (smoothly, per step)."""
    kind: Literal["exponential"]
    """Decay by rate per epoch."""
    rate: Annotated[float, Field(gt=0.0, le=1.0, allow_inf_nan=False)] = 0.97
    """Factor applied to the learning rate per epoch."""
    knobs: ClassVar[tuple[str, ...]] = ("rate",)


class Cosine(Strict):
    """Cosine decay over all training steps down to ``final_fraction`` of the base rate."""
    kind: Literal["cosine"]
    """Cosine decay."""
    final_fraction: Fraction = 0.0
    """Learning rate at the end, as a fraction of the base rate."""
    knobs: ClassVar[tuple[str, ...]] = ("final_fraction",)


class WarmupCosine(Strict):
    """Linear warm-up from 0 over ``warmup_epochs``, then cosine decay to ``final_fraction``."""
    kind: Literal["warmup_cosine"]
    """Linear warm-up, then cosine decay."""
    warmup_epochs: Annotated[int, Field(ge=1, le=MAX_EPOCHS)] = 1
    """Epochs of linear warm-up from 0 to the base rate."""
    final_fraction: Fraction = 0.0
    """Learning rate at the end, as a fraction of the base rate."""
    knobs: ClassVar[tuple[str, ...]] = ("final_fraction",)

    def problems(self, spec):
        if self.warmup_epochs < spec.training.epochs:
            return []
        return [("warmup_epochs", f"{self.warmup_epochs} must be below training.epochs = {spec.training.epochs}")]


Schedule = Annotated[Union[Constant, Exponential, Cosine, WarmupCosine], Field(discriminator="kind")]
LearningRate = Annotated[float, Field(gt=0.0, le=1e6, allow_inf_nan=False)]


class SGD(Strict):
    """Stochastic gradient descent, with optional (Nesterov) momentum."""

    kind: Literal["sgd"]
    """Stochastic gradient descent."""
    learning_rate: LearningRate = 0.05
    """Base learning rate."""
    momentum: Rate = 0.0
    """Momentum coefficient (0: plain SGD)."""
    nesterov: bool = False
    """Nesterov's form of momentum."""
    schedule: Schedule = Constant(kind="constant")
    """Learning-rate schedule, selected by kind."""
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "momentum")


class Adam(Strict):
    """Kingma & Ba 2015."""

    kind: Literal["adam"]
    """Adam."""
    learning_rate: LearningRate = 1e-3
    """Base learning rate."""
    b1: Rate = 0.9
    """Decay of the first-moment estimate."""
    b2: Rate = 0.999
    """Decay of the second-moment estimate."""
    eps: Positive = 1e-8
    """Added to the denominator for numerical stability."""
    schedule: Schedule = Constant(kind="constant")
    """Learning-rate schedule, selected by kind."""
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "b1", "b2", "eps")


class AdamW(Adam):
    """Adam with decoupled weight decay; λ is ``regularization.weight_decay``."""
    kind: Literal["adamw"]
    """Adam with decoupled weight decay."""

    def problems(self, spec):
        if spec.regularization.decoupled:
            return []
        return [("kind", "'adamw' applies weight decay decoupled from the gradient; set regularization.decoupled = "
                         "true (λ is regularization.weight_decay) or use 'adam'")]


class RMSProp(Strict):
    """Gradient scaled by a running mean of its square."""

    kind: Literal["rmsprop"]
    """RMSProp."""
    learning_rate: LearningRate = 1e-3
    """Base learning rate."""
    decay: Rate = 0.9
    """Decay of the running mean of squared gradients."""
    eps: Positive = 1e-8
    """Added to the denominator for numerical stability."""
    momentum: Rate = 0.0
    """Momentum coefficient."""
    schedule: Schedule = Constant(kind="constant")
    """Learning-rate schedule, selected by kind."""
    knobs: ClassVar[tuple[str, ...]] = ("learning_rate", "decay", "eps", "momentum")


Optimizer = Annotated[Union[SGD, Adam, AdamW, RMSProp], Field(discriminator="kind")]


# ── training ────────────────────────────────────────────────────────────────────────────────────
class Training(Strict):
    """How long and in what batches each run trains."""

    epochs: Annotated[int, Field(ge=1, le=MAX_EPOCHS)] = 20
    """Passes over the training split."""
    batch_size: Annotated[int, Field(ge=1, le=MAX_SAMPLES)] = 64
    """Rows per optimization step."""
    drop_last: bool = True
    """Drop the last, incomplete batch of each epoch."""

    def steps(self, n_train: int) -> int:
        """Optimization steps per epoch over ``n_train`` training rows."""
        return n_train // self.batch_size if self.drop_last else -(-n_train // self.batch_size)

    def problems(self, spec):
        rows = spec.data.training_rows
        if rows is not None and self.batch_size > rows[0]:
            return [("batch_size", f"{self.batch_size} exceeds the {rows[0]} training samples ({rows[1]}); "
                                   f"use at most {rows[0]}")]
        return []


# ── ablation ────────────────────────────────────────────────────────────────────────────────────
AxisValue = Union[bool, int, float, str, list, dict]
_DOTTED_PATTERN = r"^[a-z_][a-z0-9_]*(\.[a-z_][a-z0-9_]*)+$"
_DOTTED = re.compile(_DOTTED_PATTERN)


class Axis(Strict):
    """One dotted key and the values it takes."""

    key: Annotated[str, Field(pattern=_DOTTED_PATTERN)]
    """Dotted key of the setting to vary, e.g. optimizer.learning_rate."""
    values: Annotated[list[AxisValue], Field(min_length=1, max_length=1000)]
    """Values the key takes, each a value of that setting."""
    # Left out of the study's JSON while unset, so existing study hashes hold (see Study.margin).
    name: Annotated[Union[Annotated[str, Field(pattern=r"^[A-Za-z][A-Za-z0-9_-]{0,23}$")], None],
                    Field(exclude_if=lambda v: v is None)] = None
    """Short name of the axis in labels and tables (e.g. lr); default: the shortest end of the key that tells the axes apart."""

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
    """One named variant of mode = "list"."""

    label: Annotated[str, Field(min_length=1, max_length=200)]
    """The variant's name in every report."""
    changes: Annotated[dict[str, AxisValue], Field(min_length=1)]
    """Dotted keys and the values this variant gives them."""

    @field_validator("changes")
    @classmethod
    def _keys(cls, v):
        for k in v:
            if not _DOTTED.match(k):
                raise ValueError(f"{k!r} is not a dotted key such as 'optimizer.learning_rate'")
        _hashable_values(list(v.values()))
        return v


class TunedKnob(Strict):
    """One knob tuned inside every arm: its listed values, or ``points`` values spaced evenly on a
    log scale from ``low`` to ``high``."""

    key: Annotated[str, Field(pattern=_DOTTED_PATTERN)]
    """Dotted key of a knob (a value the compiled program takes as input), e.g. optimizer.learning_rate."""
    values: Union[Annotated[list[Annotated[float, Field(allow_inf_nan=False)]], Field(min_length=1, max_length=100)], None] = None
    """The values tried in every arm; or give low, high and points instead."""
    low: Union[Positive, None] = None
    """Smallest value of a log-spaced range (with high and points)."""
    high: Union[Positive, None] = None
    """Largest value of a log-spaced range (with low and points)."""
    points: Union[Annotated[int, Field(ge=2, le=100)], None] = None
    """Number of log-spaced values from low to high, both included."""

    @model_validator(mode="after")
    def _one_form(self):
        ranged = (self.low, self.high, self.points)
        if self.values is not None:
            if any(x is not None for x in ranged):
                raise ValueError("give either values = [...] or low, high and points, not both")
            if len(set(self.values)) != len(self.values):
                raise ValueError(f"@values: each value may appear once (got {self.values})")
        elif any(x is None for x in ranged):
            raise ValueError("give values = [...], or low, high and points (points values spaced evenly on a "
                             "log scale from low to high)")
        elif not self.low < self.high:
            raise ValueError(f"@high: {self.high} must be above low = {self.low}")
        return self

    @property
    def grid(self) -> list[float]:
        """The values tried; a range's values rounded to 4 significant digits (labels stay short; the rounded values are the ones run)."""
        if self.values is not None:
            return list(self.values)
        ratio = self.high / self.low
        return [float(f"{self.low * ratio ** (i / (self.points - 1)):.4g}") for i in range(self.points)]


class Tuning(Strict):
    """Knobs tuned inside every arm with the same budget; each arm is then represented, per seed, by
    the setting with the best validation score, and the arms are compared on the test split."""

    knob: Annotated[list[TunedKnob], Field(min_length=1, max_length=8)]
    """[[ablation.tune.knob]] tables; every arm tries every combination of their values."""
    metric: Union[str, None] = None
    """Validation metric that selects an arm's setting (default: study.metric, which must then be a validation metric)."""
    epoch: Literal["last", "best"] = "last"
    """Epoch a run is judged at: its last, or the one with its best value of the metric; test scores are taken there too."""

    @model_validator(mode="after")
    def _distinct_keys(self):
        keys = [k.key for k in self.knob]
        dup = sorted({k for k in keys if keys.count(k) > 1})
        if dup:
            raise ValueError(f"each knob may be tuned once (repeated: {dup})")
        return self

    @property
    def settings(self) -> list[dict[str, float]]:
        """Every combination of the tuned values, the last knob varying fastest: one arm's budget."""
        out: list[dict[str, float]] = [{}]
        for k in self.knob:
            out = [{**s, k.key: v} for s in out for v in k.grid]
        return out


class Ablation(Strict):
    """How variants are derived from the base configuration."""

    mode: Literal["grid", "one_at_a_time", "list"] = "grid"
    """grid: every combination of the axes; one_at_a_time: the base, then each value alone; list: the listed variants."""
    axis: Annotated[list[Axis], Field(max_length=32)] = []
    """[[ablation.axis]] tables (grid and one_at_a_time)."""
    variant: Annotated[list[ListedVariant], Field(max_length=10_000)] = []
    """[[ablation.variant]] tables (list)."""
    include_base: bool = True
    """list: run the base configuration too, labelled base."""
    # Left out of the dump while unset, so studies without it keep their hash.
    tune: Annotated[Union[Tuning, None], Field(exclude_if=lambda v: v is None)] = None
    """[ablation.tune]: knobs tuned inside every arm (the variants above), compared on the test split."""

    @model_validator(mode="after")
    def _fits_mode(self):
        if self.mode == "list":
            if not self.variant:
                raise ValueError("mode 'list' needs [[ablation.variant]] tables (label = ..., changes = {...})")
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
            names = [a.name for a in self.axis if a.name is not None]
            dup = sorted({n for n in names if names.count(n) > 1})
            if dup:
                raise ValueError(f"axis names must be distinct (repeated: {dup})")
        return self

    def problems(self, spec):
        if self.tune is None:
            return []
        if spec.data.test == 0:
            return [("tune", "tuning inside arms compares the arms on a test split, which this study lacks; "
                             "set data.test (e.g. 0.2)")]
        chooser = self.tune.metric or spec.study.metric
        task, classes = task_of(spec.data), classes_of(spec.data)
        if chooser.startswith("val_") and metric_problem(chooser, task, classes) is None:
            return []
        choices = ", ".join(m for m in metrics_of(task, classes) if m.startswith("val_"))
        if self.tune.metric:
            return [("tune.metric", f"{chooser!r} cannot choose an arm's setting: the choice is made on "
                                    f"validation data (use one of {choices})")]
        return [("tune", f"study.metric {chooser!r} cannot choose an arm's setting: the choice is made on "
                         f"validation data (use one of {choices}, or set ablation.tune.metric)")]


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
    """One study: a base configuration and an [ablation] that derives variants from it."""

    study: Study
    """Name, seeds and headline metric."""
    data: Data = SyntheticData()
    """The data set: a built-in generator or a file, selected by kind."""
    model: Network = Model()
    """The network: a multilayer perceptron (kind = "mlp", the default) or a convolutional network (kind = "conv")."""
    divergence: Divergence = KL(kind="kl")
    """The training loss and output activation, selected by kind."""
    normalization: Normalization = NoNorm(kind="none")
    """Normalization between each hidden affine map and its activation, selected by kind."""
    regularization: Regularization = Regularization()
    """Weight decay (in the loss or decoupled) and dropout on the hidden layers."""
    optimizer: Optimizer = SGD(kind="sgd")
    """The optimizer and its learning-rate schedule, selected by kind."""
    training: Training = Training()
    """Epochs and batches."""
    ablation: Union[Ablation, None] = None
    """How variants are derived from the base configuration."""

    @model_validator(mode="after")
    def _coherent(self):
        # Cross-section rules live with the sections they are about (``Strict.problems``); each
        # names the key to change, and problems.pydantic_problems reads the "@key: message" lines
        # back into separate, located problems.
        problems = section_problems(self, self)
        if problems:
            raise ValueError("\n".join(f"@{key}: {msg}" for key, msg in problems))
        return self

    @property
    def selection(self) -> tuple[str, Literal["last", "best"]]:
        """(metric, epoch): the epoch every run is judged at and its test scores are taken at —
        ``[ablation.tune]``'s, else the last epoch (the metric then only names the headline)."""
        tune = self.ablation.tune if self.ablation is not None else None
        if tune is None:
            return self.study.metric, "last"
        return tune.metric or self.study.metric, tune.epoch


def example_shape(data: SyntheticData | FileData) -> tuple[int, ...] | None:
    """One example's shape as the spec declares it; None for a file without data.shape (its
    arrays decide)."""
    if isinstance(data, FileData):
        return None if data.shape is None else tuple(data.shape)
    if data.generator in SHAPED_GENERATORS:
        return tuple(data.shape) if data.shape is not None else SHAPED_GENERATORS[data.generator]
    return (data.features,)


def split_sizes(samples: int, validation: float, test: float = 0.0) -> tuple[int, int, int]:
    """Rows of the training, validation and test splits: each held-out share is rounded on its
    own, the rest trains."""
    n_val, n_test = int(round(samples * validation)), int(round(samples * test))
    return samples - n_val - n_test, n_val, n_test


def train_size(samples: int, validation: float, test: float = 0.0) -> int:
    """Rows in the training split: the validation and test shares are rounded, the rest trains."""
    return split_sizes(samples, validation, test)[0]


def split_problems(samples: int, validation: float, test: float, what: str) -> list[tuple[str, str]]:
    """(key, message) when the shares leave a split of ``samples`` rows empty (``what`` names
    them); the key is the share to change."""
    n_train, n_val, n_test = split_sizes(samples, validation, test)
    if n_val < 1 or (n_train < 1 and not test):
        return [("data.validation", f"{validation} leaves no rows on one side of the split of {what}")]
    if test and n_test < 1:
        return [("data.test", f"{test} of {what} rounds to no test row; use at least {math.ceil(1000 / samples) / 1000}")]
    if n_train < 1:
        return [("data.test", f"data.validation = {validation} and data.test = {test} leave no training rows "
                              f"of {what} ({n_val} validation + {n_test} test); lower one of them so that "
                              "they add up to well below 1")]
    return []


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
