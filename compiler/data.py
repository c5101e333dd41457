"""Data sets: the built-in generators and tables read from files, as host numpy arrays.

Contract: :func:`load_data` ``(variant, base_dir) -> Dataset`` returns the *whole* data set,
un-split and un-standardized: every lane of a compiled group shares it, and each run draws its own
train/validation split (and fits standardization on its training rows) inside the program.

- ``x``: float32 ``[n, features]``; ``y``: int32 ``[n]`` class indices ``0..K−1`` (labels mapped in
  sorted order) or float32 ``[n, targets]``;
- ``fingerprint``: SHA-256 hex of the file's bytes, or of the generated arrays (dtype, shape and
  bytes), so a replay can check it reads the same data.

Generators draw from ``np.random.Generator(np.random.PCG64(data.seed))``, whose stream numpy
keeps fixed across platforms and versions. Problems with a file raise :class:`DataError` with
one line naming the file and what is wrong.
"""

from __future__ import annotations

import hashlib
import pathlib
from typing import Callable, NamedTuple

import numpy as np

from compiler.spec import FileData, Spec, classes_of, task_of, train_size

__all__ = ["Dataset", "DataError", "load_data", "GENERATORS", "rings", "spirals", "blobs", "friedman1",
           "sines", "fingerprint_arrays"]


class DataError(ValueError):
    """A data set that cannot be used; the message is one line naming the source."""


class Dataset(NamedTuple):
    x: np.ndarray
    y: np.ndarray
    task: str
    classes: int | None
    fingerprint: str


# ── generators ──────────────────────────────────────────────────────────────────────────────────
# Each takes (rng, samples, features, classes, noise) and returns (x float64, y). Features beyond
# the ones a pattern lives in are standard-normal distractors.

def _balanced_labels(rng, samples, classes):
    return rng.permutation(np.arange(samples) % classes)


def _with_distractors(rng, signal, features):
    extra = rng.standard_normal((signal.shape[0], features - signal.shape[1]))
    return np.concatenate([signal, extra], axis=1)


def rings(rng, samples, features, classes, noise):
    """Concentric rings in the first two features: class ``k`` lies at radius ``k + 1``, at a
    uniform angle, with radial noise of standard deviation ``noise``."""
    label = _balanced_labels(rng, samples, classes)
    angle = rng.uniform(0.0, 2.0 * np.pi, samples)
    radius = label + 1.0 + noise * rng.standard_normal(samples)
    signal = np.stack([radius * np.cos(angle), radius * np.sin(angle)], axis=1)
    return _with_distractors(rng, signal, features), label


def spirals(rng, samples, features, classes, noise):
    """Interleaved spiral arms in the first two features: arm ``k`` starts at angle ``2πk/K`` and
    turns 1.5 times while its radius grows from 0 to 1; both coordinates get Gaussian noise."""
    label = _balanced_labels(rng, samples, classes)
    t = rng.uniform(0.0, 1.0, samples)
    angle = 2.0 * np.pi * label / classes + 3.0 * np.pi * t
    signal = np.stack([t * np.cos(angle), t * np.sin(angle)], axis=1)
    signal = signal + noise * rng.standard_normal(signal.shape)
    return _with_distractors(rng, signal, features), label


def blobs(rng, samples, features, classes, noise):
    """Gaussian clusters: class centres uniform in ``[−3, 3]^features``, isotropic spread of
    standard deviation ``0.5 + noise``."""
    centres = rng.uniform(-3.0, 3.0, (classes, features))
    label = _balanced_labels(rng, samples, classes)
    x = centres[label] + (0.5 + noise) * rng.standard_normal((samples, features))
    return x, label


def friedman1(rng, samples, features, classes, noise):
    """Friedman (1991): ``x ~ U[0, 1]^features`` and
    ``y = 10 sin(π x₁x₂) + 20(x₃ − ½)² + 10x₄ + 5x₅ + noise·N(0, 1)``; features past the fifth
    do not enter the target."""
    x = rng.uniform(0.0, 1.0, (samples, features))
    y = (10.0 * np.sin(np.pi * x[:, 0] * x[:, 1]) + 20.0 * (x[:, 2] - 0.5) ** 2
         + 10.0 * x[:, 3] + 5.0 * x[:, 4] + noise * rng.standard_normal(samples))
    return x, y[:, None]


def sines(rng, samples, features, classes, noise):
    """A sum of sines: ``x ~ U[−π, π]^features``, ``y = Σ_j a_j sin(ω_j x_j + φ_j) + noise·N(0,1)``
    with amplitudes ``a_j ~ U[0.5, 1.5]``, integer frequencies ``ω_j ∈ {1, 2, 3}`` and phases
    ``φ_j ~ U[0, 2π)`` drawn once from the seed."""
    amplitude = rng.uniform(0.5, 1.5, features)
    frequency = rng.integers(1, 4, features)
    phase = rng.uniform(0.0, 2.0 * np.pi, features)
    x = rng.uniform(-np.pi, np.pi, (samples, features))
    y = np.sum(amplitude * np.sin(frequency * x + phase), axis=1) + noise * rng.standard_normal(samples)
    return x, y[:, None]


GENERATORS: dict[str, Callable] = {"rings": rings, "spirals": spirals, "blobs": blobs,
                                   "friedman1": friedman1, "sines": sines}


def fingerprint_arrays(*arrays: np.ndarray) -> str:
    """SHA-256 over each array's dtype, shape and C-order bytes."""
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


# ── files ───────────────────────────────────────────────────────────────────────────────────────
def _read_columns(path: pathlib.Path) -> dict[str, np.ndarray]:
    suffix = path.suffix.lower()
    if suffix == ".npz":
        try:
            with np.load(path, allow_pickle=False) as archive:
                return {name: archive[name] for name in archive.files}
        except ValueError as err:  # object arrays need pickle, which is refused
            raise DataError(f"{path}: cannot read without pickle ({err}); store plain numeric arrays") from None
    import pyarrow as pa
    import pyarrow.csv
    import pyarrow.parquet
    try:
        table = pa.parquet.read_table(path) if suffix == ".parquet" else pa.csv.read_csv(path)
    except (pa.ArrowException, OSError) as err:
        raise DataError(f"{path}: cannot read as {suffix[1:]} ({str(err).splitlines()[0]})") from None
    out = {}
    for name in table.column_names:
        column = table.column(name)
        if column.null_count:
            raise DataError(f"{path}: column '{name}' has {column.null_count} missing values; fill or drop them")
        out[name] = column.to_numpy(zero_copy_only=False)
    return out


def _numeric(path, name, values) -> np.ndarray:
    if not (np.issubdtype(values.dtype, np.number) or values.dtype == np.bool_):
        raise DataError(f"{path}: column '{name}' is not numeric (dtype {values.dtype}); "
                        "encode it as numbers or leave it out of data.features")
    values = values.astype(np.float64)
    if not np.all(np.isfinite(values)):
        bad = int(np.sum(~np.isfinite(values)))
        raise DataError(f"{path}: column '{name}' has {bad} NaN or infinite values; clean them first")
    return values


def _load_file(data: FileData, base_dir: pathlib.Path):
    path = pathlib.Path(base_dir) / data.path
    if not path.is_file():
        raise DataError(f"{path}: data file not found (data.path is resolved relative to the spec's folder)")
    raw = path.read_bytes()
    columns = _read_columns(path)
    if data.target not in columns:
        raise DataError(f"{path}: target column '{data.target}' is missing "
                        f"(columns: {', '.join(columns) or 'none'}); set data.target")
    names = data.features if data.features is not None else [c for c in columns if c != data.target]
    if not names:
        raise DataError(f"{path}: no feature columns besides the target '{data.target}'")
    for name in names:
        if name not in columns:
            raise DataError(f"{path}: feature column '{name}' is missing (columns: {', '.join(columns)})")
    n = len(columns[data.target])
    blocks = []
    for name in names:
        values = _numeric(path, name, columns[name])
        if len(values) != n or values.ndim > 2:
            raise DataError(f"{path}: column '{name}' has shape {values.shape}, expected {n} rows like the target")
        blocks.append(values.reshape(n, -1))
    x = np.concatenate(blocks, axis=1)
    target = columns[data.target]
    if data.task == "classification":
        if target.ndim != 1:
            raise DataError(f"{path}: class target '{data.target}' must be one column (shape {target.shape})")
        if np.issubdtype(target.dtype, np.floating) and not np.all(np.isfinite(target)):
            raise DataError(f"{path}: target column '{data.target}' has NaN or infinite values")
        labels, y = np.unique(target, return_inverse=True)
        if len(labels) < 2:
            raise DataError(f"{path}: target column '{data.target}' has {len(labels)} class(es); "
                            "classification needs at least 2")
        return x, y.reshape(-1), len(labels), raw
    y = _numeric(path, data.target, target)
    return x, y.reshape(n, -1), None, raw


def load_data(variant: Spec, base_dir: pathlib.Path) -> Dataset:
    """The data set of a resolved variant; ``base_dir`` is the spec file's folder."""
    data = variant.data
    task = task_of(data)
    if isinstance(data, FileData):
        x, y, classes, raw = _load_file(data, base_dir)
        fingerprint = hashlib.sha256(raw).hexdigest()
        where = str(pathlib.Path(base_dir) / data.path)
        n = len(x)
        n_train = train_size(n, data.validation)
        if n_train < 1 or n_train == n:
            raise DataError(f"{where}: data.validation = {data.validation} leaves no rows on one side of the "
                            f"split of {n} rows")
        if variant.training.batch_size > n_train:
            raise DataError(f"{where}: training.batch_size = {variant.training.batch_size} exceeds the {n_train} "
                            f"training rows; use at most {n_train}")
        if variant.divergence.kind == "bce" and classes != 2:
            raise DataError(f"{where}: divergence 'bce' is binary but the target has {classes} classes; use 'kl'")
    else:
        rng = np.random.Generator(np.random.PCG64(data.seed))
        x, y = GENERATORS[data.generator](rng, data.samples, data.features, data.classes, data.noise)
        classes = classes_of(data)
        fingerprint = None
    x = np.ascontiguousarray(x, np.float32)
    y = np.ascontiguousarray(y, np.int32 if task == "classification" else np.float32)
    return Dataset(x, y, task, classes, fingerprint or fingerprint_arrays(x, y))
