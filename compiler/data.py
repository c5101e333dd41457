"""Data sets: the built-in generators and tables read from files, as host numpy arrays.

Contract: :func:`load_data` ``(variant, base_dir) -> Dataset`` returns the *whole* data set,
un-split and un-standardized: every lane of a compiled group shares it, and each run draws its own
train/validation split (and fits standardization on its training rows) inside the program.

- ``x``: float32 ``[n, *shape]``: ``[n, features]`` for vectors, ``[n, height, width, channels]``
  or ``[n, length, channels]`` for images and signals (``data.shape``, an NPZ array's own shape,
  the glyphs generator); ``y``: int32 ``[n]`` class indices ``0..K−1`` (labels mapped in
  sorted order) or float32 ``[n, targets]``;
- ``data_hash``: SHA-256 hex of the file's bytes, or of the generated arrays (dtype, shape and
  bytes), so a replay can check it reads the same data.

Files are first read through their metadata only (:func:`inspect_file`: NPZ array headers, the
Parquet footer, a CSV's header and, up to :data:`CSV_COUNT_BYTES`, its row count):
:func:`file_problems` lists what that shows is wrong (missing or misspelt columns, complex or
non-numeric columns, a split or batch the rows cannot fill), :func:`load_bytes` what loading will
take, and :func:`check_files` reports both for a loaded study at its spec keys (``lesion check``
and ``lesion run``, before anything is created). :func:`locate` refuses a symbolic link leading out
of the spec's folder.

Generators draw from ``np.random.Generator(np.random.PCG64(data.seed))``, whose stream numpy
keeps fixed across platforms and versions. Problems with a file raise :class:`DataError` with
one line naming the file and what is wrong.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import pathlib
from typing import Callable, NamedTuple

import numpy as np

from compiler.errors import Problem, SpecError, UserError, dotted
from compiler.locate import line_of
from compiler.spec import FileData, Spec, classes_of, example_shape, metric_problem, split_problems, task_of, train_size

__all__ = ["Dataset", "DataError", "load_data", "FileInfo", "Column", "inspect_file", "load_bytes", "file_problems",
           "check_files", "locate", "GENERATORS", "rings", "spirals", "blobs", "glyphs", "friedman1",
           "sines", "hash_arrays"]


class DataError(UserError, ValueError):
    """A data set that cannot be used; the message is one line naming the source."""


class Dataset(NamedTuple):
    x: np.ndarray
    y: np.ndarray
    task: str
    classes: int | None
    data_hash: str

    @property
    def targets(self) -> int | None:
        """Target columns of a regression set; None for class labels."""
        return self.y.shape[1] if self.task == "regression" else None


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


def glyphs(rng, samples, shape, classes, noise):
    """Shaped examples for convolutional networks, ``shape`` channels last. Images
    (``[height, width, channels]``): class ``k`` is a bright bar at angle ``πk/K`` through a
    point jittered around the centre, of a random length between a third and two thirds of the
    image and a soft edge (a Gaussian profile of 0.8 pixels across it). Signals (``[length,
    channels]``): class ``k`` is a wave packet of ``k + 1`` cycles over a random stretch of a
    third of the length, at a random place. Each channel shows the pattern at its own gain in
    ``[0.5, 1.5]``; Gaussian noise of standard deviation ``noise`` is added to every value. The
    class lives in the pattern's orientation or frequency, not in where it is: what a
    convolution's shared weights find anywhere."""
    label = _balanced_labels(rng, samples, classes)
    spatial, channels = tuple(shape[:-1]), shape[-1]
    if len(spatial) == 2:
        h, w = spatial
        yy, xx = np.meshgrid(np.arange(h) - (h - 1) / 2, np.arange(w) - (w - 1) / 2, indexing="ij")
        angle = np.pi * label / classes
        centre = rng.uniform(-0.15, 0.15, (samples, 2)) * np.array([h, w])
        half = rng.uniform(1 / 6, 1 / 3, samples) * min(h, w)
        dy, dx = yy[None] - centre[:, 0, None, None], xx[None] - centre[:, 1, None, None]
        along = dx * np.cos(angle)[:, None, None] + dy * np.sin(angle)[:, None, None]
        across = -dx * np.sin(angle)[:, None, None] + dy * np.cos(angle)[:, None, None]
        pattern = np.exp(-0.5 * (across / 0.8) ** 2) * (np.abs(along) <= half[:, None, None])
    else:
        (length,) = spatial
        t = np.arange(length)[None]
        span = length / 3
        start = rng.uniform(0, length - span, samples)[:, None]
        inside = (t >= start) & (t < start + span)
        pattern = np.sin(2 * np.pi * (label[:, None] + 1) * (t - start) / span) * inside
    gain = rng.uniform(0.5, 1.5, (samples, channels))
    x = pattern[..., None] * gain.reshape((samples,) + (1,) * len(spatial) + (channels,))
    return x + noise * rng.standard_normal(x.shape), label


GENERATORS: dict[str, Callable] = {"rings": rings, "spirals": spirals, "blobs": blobs, "glyphs": glyphs,
                                   "friedman1": friedman1, "sines": sines}


def hash_arrays(*arrays: np.ndarray) -> str:
    """SHA-256 over each array's dtype, shape and C-order bytes."""
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


# ── files ───────────────────────────────────────────────────────────────────────────────────────
# A CSV up to this size is read through once at check time to count its rows; a larger one is
# sized from its first block, and the row-count checks wait for the run.
CSV_COUNT_BYTES = 64 * 2**20
# Besides a file's columns as read, loading holds each feature column as float64, all of them
# concatenated (float64) and the float32 copy the runs use: 8 + 8 + 4 bytes per feature value.
_LOAD_BYTES_PER_VALUE = 20
_ARROW_DTYPES = {"double": "float64", "float": "float32", "halffloat": "float16"}
_CSV_BLOCK = 1 << 20
# Only a member's header is decompressed: the shape and dtype it declares, not the data.
_NPY_HEADERS = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}


class Column(NamedTuple):
    dtype: str              # numpy's name (float64, int32, bool, complex128, <U5) or Arrow's (string)
    shape: tuple[int, ...]  # rows first; () rows unknown (a large CSV)

    @property
    def numeric(self) -> bool:
        return self.dtype == "bool" or self.dtype.startswith(("int", "uint", "float"))


class FileInfo(NamedTuple):
    """What a data file's metadata says, without reading its rows: NPZ array headers, the Parquet
    footer, a CSV's header and size."""
    path: pathlib.Path
    columns: dict[str, Column]
    rows: int | None        # None: a CSV over CSV_COUNT_BYTES, not counted
    stored_bytes: int       # the columns as the reader holds them, before conversion


def locate(data: FileData, base_dir: pathlib.Path) -> pathlib.Path:
    """The data file of ``data``, refused when missing or when a symbolic link on its way leads
    out of the spec's folder (the spec's own rule, ``compiler.spec.FileData``, for links)."""
    folder = pathlib.Path(base_dir).resolve()
    path = folder / data.path
    real = path.resolve()
    if not real.is_relative_to(folder):
        raise DataError(f"{path}: a symbolic link leads out of the spec's folder (to {real}); a spec reads only "
                        "files inside its folder: copy the file there")
    if not real.is_file():
        raise DataError(f"{path}: data file not found (data.path is resolved relative to the spec's folder)")
    return real


def _npz_columns(path: pathlib.Path) -> dict[str, Column]:
    import zipfile
    out = {}
    try:
        with zipfile.ZipFile(path) as archive:
            for member in archive.namelist():
                if not member.endswith(".npy"):
                    continue
                with archive.open(member) as fh:
                    version = np.lib.format.read_magic(fh)
                    if version not in _NPY_HEADERS:
                        raise ValueError(f"{member}: .npy format {version[0]}.{version[1]} is not supported")
                    shape, _, dtype = _NPY_HEADERS[version](fh)
                out[member[:-4]] = Column(dtype.str[1:] if dtype.kind in "US" else dtype.name, tuple(shape))
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as err:
        raise DataError(f"{path}: cannot read as npz ({err})") from None
    return out


def inspect_file(data: FileData, base_dir: pathlib.Path) -> FileInfo:
    """A data file's columns, rows and in-memory size from its metadata alone (see FileInfo)."""
    path = locate(data, base_dir)
    suffix = path.suffix.lower()
    if suffix == ".npz":
        columns = _npz_columns(path)
        target = columns.get(data.target)
        rows = target.shape[0] if target is not None and target.shape else None
        stored = sum(np.dtype(c.dtype).itemsize * int(np.prod(c.shape, dtype=object)) for c in columns.values())
        return FileInfo(path, columns, rows, stored)
    import pyarrow as pa
    import pyarrow.csv
    import pyarrow.parquet
    try:
        if suffix == ".parquet":
            meta = pa.parquet.read_metadata(path)
            schema, rows, known = meta.schema.to_arrow_schema(), meta.num_rows, meta.num_rows
        else:
            options = pa.csv.ReadOptions(block_size=_CSV_BLOCK)
            with pa.csv.open_csv(path, read_options=options) as reader:
                schema, size = reader.schema, path.stat().st_size
                if size <= CSV_COUNT_BYTES:
                    rows = known = sum(batch.num_rows for batch in reader)
                else:  # as many rows as the first block's bytes per row make of the whole file
                    rows, known = None, -(-size * reader.read_next_batch().num_rows // _CSV_BLOCK)
    except (pa.ArrowException, OSError, StopIteration) as err:
        raise DataError(f"{path}: cannot read as {suffix[1:]} ({str(err).splitlines()[0] if str(err) else 'empty'})") from None
    columns = {f.name: Column(_ARROW_DTYPES.get(str(f.type), str(f.type)), () if rows is None else (rows,))
               for f in schema}
    # Arrow holds 8 bytes per value of every column (the widest numbers), then numpy copies them.
    return FileInfo(path, columns, rows, 2 * 8 * known * len(columns))


def load_bytes(info: FileInfo, data: FileData) -> int:
    """Peak memory of :func:`load_data` on this file, estimated from its metadata."""
    rows = info.rows if info.rows is not None else info.stored_bytes // (16 * max(1, len(info.columns)))
    names = data.features if data.features is not None else [c for c in info.columns if c != data.target]
    width = sum(int(np.prod(info.columns[c].shape[1:], dtype=object)) for c in names if c in info.columns)
    return info.stored_bytes + _LOAD_BYTES_PER_VALUE * rows * width


def _column_problems(name: str, column: str, col: Column, rows: int | None, numeric: bool,
                     column_is_target: bool = False) -> list[str]:
    if col.dtype.startswith("complex"):
        return [f"column '{column}' holds complex numbers (dtype {col.dtype}) in {name}; their imaginary part "
                "would be lost: store the real and imaginary parts as two columns"]
    if col.dtype == "object":
        return [f"column '{column}' holds Python objects (dtype object) in {name}, which cannot be read without "
                "pickle (refused: a data file is never code); store plain numeric arrays"]
    if numeric and not col.numeric:
        return [f"column '{column}' is not numeric (dtype {col.dtype}) in {name}; encode it as numbers or leave "
                "it out of data.features"]
    if (len(col.shape) > 2 and column_is_target) or (rows is not None and col.shape and col.shape[0] != rows):
        return [f"column '{column}' has shape {col.shape} in {name}, expected {rows} rows like the target "
                f"(and at most 2 dimensions{'' if column_is_target else ' for the target'})"]
    return []


def file_problems(variant: Spec, info: FileInfo) -> list[tuple[tuple, str]]:
    """Every problem of a variant's data file its metadata shows, as (spec key path, message):
    missing columns (with the closest name), complex or non-numeric columns, bad shapes, and a
    split or batch the file's rows cannot fill."""
    data, columns = variant.data, info.columns
    name = data.path
    out: list[tuple[tuple, str]] = []

    def missing(loc, what, column):
        close = difflib.get_close_matches(column, list(columns), n=1, cutoff=0.6)
        hint = f"; did you mean '{close[0]}'?" if close else f" (columns: {', '.join(columns) or 'none'})"
        out.append((loc, f"{what} column '{column}' is missing from {name}{hint}"))

    target = columns.get(data.target)
    if target is None:
        missing(("data", "target"), "target", data.target)
    else:
        out += [(("data", "target"), m) for m in
                _column_problems(name, data.target, target, info.rows, data.task == "regression", True)]
        if data.task == "classification" and len(target.shape) > 1:
            out.append((("data", "target"), f"class target '{data.target}' must be one column in {name} "
                                            f"(shape {target.shape}); set data.task = \"regression\" for vectors"))
    if data.features is None:
        names = [(c, ("data", "features")) for c in columns if c != data.target]
        if not names:
            out.append((("data", "features"), f"{name} has no column besides the target '{data.target}'"))
    else:
        names = [(c, ("data", "features", i)) for i, c in enumerate(data.features)]
    for column, loc in names:
        if column not in columns:
            missing(loc, "feature", column)
        else:
            out += [(loc, m) for m in _column_problems(name, column, columns[column], info.rows, True)]
    found = [columns[c] for c, _ in names if c in columns]
    if data.shape is not None and len(found) == len(names) and all(c.shape for c in found):
        width = sum(math.prod(c.shape[1:]) for c in found)
        if math.prod(data.shape) != width:
            out.append((("data", "shape"), f"{data.shape} holds {math.prod(data.shape)} values but a row of {name} "
                                           f"has {width} feature values; give a shape whose sizes multiply to {width}"))
    if info.rows is not None:
        n, n_train = info.rows, train_size(info.rows, data.validation, data.test)
        if not data.test and (n_train < 1 or n_train == n):
            if n < 2:
                fit = "a split needs at least 2 rows"
            elif n_train == n:
                fit = f"use at least {math.ceil(1000 / n) / 1000}"
            else:
                fit = f"use at most {math.floor(1000 * (n - 1) / n) / 1000}"
            out.append((("data", "validation"), f"{data.validation} leaves no rows on one side of the split of the "
                                                f"{n} rows of {name}; {fit}"))
        elif data.test:
            out += [(tuple(key.split(".")), m) for key, m in split_problems(n, data.validation, data.test,
                                                                            f"the {n} rows of {name}")]
        if 1 <= n_train < variant.training.batch_size:
            share = f"1 − {data.validation}" + (f" − {data.test}" if data.test else "")
            out.append((("training", "batch_size"), f"{variant.training.batch_size} exceeds the {n_train} training "
                                                    f"rows of {name} ({n} rows × ({share})); use at "
                                                    f"most {n_train}"))
    return out


def check_files(study, room: int | None = None) -> None:
    """Raise :class:`SpecError` with every problem of a loaded study's data files (metadata only,
    see :func:`file_problems`), each located at its spec key, plus any file whose loading would
    need more than ``room`` bytes. A problem that only a variant has names the variant."""
    base_dir = pathlib.Path(study.path).resolve().parent
    infos: dict[str, FileInfo | DataError] = {}
    found: dict[tuple, str] = {}
    for v in study.variants:
        data = v.spec.data
        if not isinstance(data, FileData):
            continue
        if data.path not in infos:
            try:
                infos[data.path] = inspect_file(data, base_dir)
            except DataError as err:
                infos[data.path] = err
        info = infos[data.path]
        if isinstance(info, DataError):
            problems = [(("data", "path"), str(info))]
        else:
            problems = file_problems(v.spec, info)
            need = load_bytes(info, data)
            if room is not None and need > room:
                problems.append((("data", "path"), f"loading {data.path} needs about {need / 2**30:.1f} GB of memory "
                                                   f"(its metadata: {_rows_text(info)} × {len(info.columns)} "
                                                   f"columns), but {max(room, 0) / 2**30:.1f} GB is available; "
                                                   "use a sample of its rows or fewer columns"))
        for loc, message in problems:
            if (loc, message) not in found:
                found[(loc, message)] = f"in variant '{v.label}': {message}" if v.changes else message
    if found:
        raise SpecError([Problem(loc, text, file=study.path, line=line_of(study.source, loc))
                         for (loc, _), text in found.items()])


def _rows_text(info: FileInfo) -> str:
    if info.rows is not None:
        return f"{info.rows} rows"
    return f"about {info.stored_bytes // (16 * max(1, len(info.columns)))} rows"


def _read_columns(info: FileInfo) -> dict[str, np.ndarray]:
    path = info.path
    if path.suffix.lower() == ".npz":
        try:
            with np.load(path, allow_pickle=False) as archive:
                return {name: archive[name] for name in archive.files}
        except ValueError as err:  # object arrays need pickle, which is refused
            raise DataError(f"{path}: cannot read without pickle ({err}); store plain numeric arrays") from None
    import pyarrow as pa
    import pyarrow.csv
    import pyarrow.parquet
    try:
        table = pa.parquet.read_table(path) if path.suffix.lower() == ".parquet" else pa.csv.read_csv(path)
    except (pa.ArrowException, OSError) as err:
        raise DataError(f"{path}: cannot read as {path.suffix[1:]} ({str(err).splitlines()[0]})") from None
    out = {}
    for name in table.column_names:
        column = table.column(name)
        if column.null_count:
            raise DataError(f"{path}: column '{name}' has {column.null_count} missing values; fill or drop them")
        out[name] = column.to_numpy(zero_copy_only=False)
    return out


def _numeric(path, name, values) -> np.ndarray:
    values = values.astype(np.float64)
    if not np.all(np.isfinite(values)):
        bad = int(np.sum(~np.isfinite(values)))
        raise DataError(f"{path}: column '{name}' has {bad} NaN or infinite values; clean them first")
    return values


def _file_hash(path: pathlib.Path) -> str:
    # In blocks: the file's bytes never sit in memory beside its decoded columns.
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(1 << 20):
            h.update(block)
    return h.hexdigest()


def _load_file(variant: Spec, base_dir: pathlib.Path):
    data = variant.data
    info = inspect_file(data, base_dir)
    problems = file_problems(variant, info)
    if problems:
        loc, message = problems[0]
        raise DataError(f"{info.path}: {dotted(loc)}: {message}")
    path = info.path
    columns = _read_columns(info)
    names = data.features if data.features is not None else [c for c in columns if c != data.target]
    target = columns[data.target]
    n = len(target)
    if n != info.rows:  # a CSV too large to count at check time
        problems = file_problems(variant, info._replace(rows=n))
        if problems:
            loc, message = problems[0]
            raise DataError(f"{path}: {dotted(loc)}: {message}")
    x = np.concatenate([_numeric(path, name, columns[name]).reshape(n, -1) for name in names], axis=1)
    if data.shape is not None:
        if math.prod(data.shape) != x.shape[1]:
            raise DataError(f"{path}: data.shape: {data.shape} holds {math.prod(data.shape)} values but a row has "
                            f"{x.shape[1]} feature values; give a shape whose sizes multiply to {x.shape[1]}")
        x = x.reshape(n, *data.shape)
    elif len(names) == 1 and columns[names[0]].ndim > 2:  # an NPZ array of images or signals
        x = x.reshape(columns[names[0]].shape)
    if data.task == "classification":
        if np.issubdtype(target.dtype, np.floating) and not np.all(np.isfinite(target)):
            raise DataError(f"{path}: target column '{data.target}' has NaN or infinite values")
        labels, y = np.unique(target, return_inverse=True)
        if len(labels) < 2:
            raise DataError(f"{path}: target column '{data.target}' has {len(labels)} class(es); "
                            "classification needs at least 2")
        classes = len(labels)
        problem = variant.divergence.class_problem(classes, f"the target has {classes} classes")
        if problem:
            raise DataError(f"{path}: divergence {problem}")
        # A per-class metric's class count is known only now (the spec's check had no labels).
        wrong = metric_problem(variant.study.metric, "classification", classes,
                               f"the labels of target column '{data.target}' in sorted order")
        if wrong:
            raise DataError(f"{path}: study.metric: {wrong}")
        return x, y.reshape(-1), classes, _file_hash(path)
    y = _numeric(path, data.target, target)
    return x, y.reshape(n, -1), None, _file_hash(path)


def load_data(variant: Spec, base_dir: pathlib.Path) -> Dataset:
    """The data set of a resolved variant; ``base_dir`` is the spec file's folder."""
    data = variant.data
    task = task_of(data)
    if isinstance(data, FileData):
        x, y, classes, data_hash = _load_file(variant, base_dir)
    else:
        rng = np.random.Generator(np.random.PCG64(data.seed))
        shape = example_shape(data)
        size = shape if len(shape) > 1 else data.features
        x, y = GENERATORS[data.generator](rng, data.samples, size, data.classes, data.noise)
        classes = classes_of(data)
        data_hash = None
    x = np.ascontiguousarray(x, np.float32)
    y = np.ascontiguousarray(y, np.int32 if task == "classification" else np.float32)
    return Dataset(x, y, task, classes, data_hash or hash_arrays(x, y))
