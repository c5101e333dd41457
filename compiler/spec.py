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
    "Strict", "Study", "SyntheticData", "FileData", "Data", "NeuronBudget", "Model", "ConvBlock", "ChannelBudget",
    "ConvModel", "Network",
    "L2", "KL", "BCE", "Huber", "Divergence", "NoNorm", "BatchNorm", "LayerNorm", "Normalization",
    "Dropout", "Regularization", "Constant", "Exponential", "Cosine", "WarmupCosine", "Schedule",
    "SGD", "Adam", "AdamW", "RMSProp", "Optimizer", "Training", "Axis", "ListedVariant",
    "Ablation", "Spec", "METRICS", "CLASSIFICATION_GENERATORS",
    "task_of", "classes_of", "example_shape",
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
    # every other field is structure, passed to its component as a Python value.
    knobs: ClassVar[tuple[str, ...]] = ()


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
    """Headline metric, summarized by `lesion show` and compared by `lesion diff`."""
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
        # every dump keeps their canonical JSON, hence their study, variant and structure hashes.
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


def _model_kind(value) -> str:
    # [model] without a kind is the multilayer perceptron, as every spec before the families was.
    return value.get("kind", "mlp") if isinstance(value, dict) else getattr(value, "kind", "mlp")


Network = Annotated[Union[Annotated[Model, Tag("mlp")], Annotated[ConvModel, Tag("conv")]], Discriminator(_model_kind)]


# ── divergence ──────────────────────────────────────────────────────────────────────────────────
class L2(Strict):
    """Identity output, half squared error (regression)."""
    kind: Literal["l2"]
    """Identity output, half squared error."""


class KL(Strict):
    """Softmax output, KL(d || y) to the (optionally smoothed) target distribution."""
    kind: Literal["kl"]
    """Softmax output, KL divergence to the target distribution."""
    label_smoothing: Rate = 0.0
    """Share of the target probability spread evenly over all classes."""
    knobs: ClassVar[tuple[str, ...]] = ("label_smoothing",)


class BCE(Strict):
    """Sigmoid output, binary cross-entropy (two classes)."""
    kind: Literal["bce"]
    """Sigmoid output, binary cross-entropy."""


class Huber(Strict):
    """Identity output, Huber loss with threshold ``delta`` (regression)."""
    kind: Literal["huber"]
    """Identity output, Huber loss."""
    delta: Positive = 1.0
    """Error at which the loss turns from quadratic to linear."""
    knobs: ClassVar[tuple[str, ...]] = ("delta",)


Divergence = Annotated[Union[L2, KL, BCE, Huber], Field(discriminator="kind")]


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
    """Probability of dropping a unit (or, for connect, a weight)."""
    kind: Literal["inverted", "scaled", "connect", "spatial"] = "inverted"
    """inverted: rescale while training; scaled: rescale at inference; connect: DropConnect on dense weights; spatial: whole channels of feature maps (inverted)."""
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
    set: Annotated[dict[str, AxisValue], Field(min_length=1)]
    """Dotted keys and the values this variant gives them."""

    @field_validator("set")
    @classmethod
    def _keys(cls, v):
        for k in v:
            if not _DOTTED.match(k):
                raise ValueError(f"{k!r} is not a dotted key such as 'optimizer.learning_rate'")
        _hashable_values(list(v.values()))
        return v


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
        # Cross-section rules. Each problem names the key to change; problems.pydantic_problems
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
        shape = example_shape(self.data)
        if self.model.kind == "conv" and shape is not None and len(shape) not in (2, 3):
            problems.append(("model.kind", f"'conv' needs examples of shape [length, channels] or [height, width, "
                                           f"channels], but the data's are {list(shape)}; set data.shape (a file) or "
                                           "use generator = 'glyphs', or use kind = 'mlp'"))
        sched = self.optimizer.schedule
        if isinstance(sched, WarmupCosine) and sched.warmup_epochs >= self.training.epochs:
            problems.append(("optimizer.schedule.warmup_epochs", f"{sched.warmup_epochs} must be below "
                                                                 f"training.epochs = {self.training.epochs}"))
        if problems:
            raise ValueError("\n".join(f"@{key}: {msg}" for key, msg in problems))
        return self


def example_shape(data: SyntheticData | FileData) -> tuple[int, ...] | None:
    """One example's shape as the spec declares it; None for a file without data.shape (its
    arrays decide)."""
    if isinstance(data, FileData):
        return None if data.shape is None else tuple(data.shape)
    if data.generator in SHAPED_GENERATORS:
        return tuple(data.shape) if data.shape is not None else SHAPED_GENERATORS[data.generator]
    return (data.features,)


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
