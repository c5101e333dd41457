"""lesion export: the written arrays are the stored network, checked outside lesion's code (plain
numpy recomputes the README's param_hash and the validation accuracy); refusals write nothing."""

import hashlib

import numpy as np
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.runner import run_study

SPEC = """
[study]
name = "hopper-grade"
seeds = 2

[data]
kind = "file"
path = "hopper.npz"
target = "label"
task = "classification"
validation = 0.25

[model]
hidden = [8, 6]
activation = "tanh"

[normalization]
kind = "batch"

[optimizer]
kind = "sgd"
learning_rate = 0.1
momentum = 0.9

[training]
epochs = 4
batch_size = 16
"""


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("export")
    rng = np.random.default_rng(17)
    x = rng.normal(size=(200, 3)).astype(np.float32)
    label = (x[:, 0] + 0.5 * x[:, 1] ** 2 > 0.4).astype(np.int64) + (x[:, 2] > 1.0)
    np.savez(tmp / "hopper.npz", f0=x[:, 0], f1=x[:, 1], f2=x[:, 2], label=label)
    (tmp / "hopper.toml").write_text(SPEC)
    path = run_study(load_study(tmp / "hopper.toml"), tmp / "r").path
    runs = pq.read_table(path / "runs.parquet").to_pandas()  # read back with pyarrow, not lesion
    return path, runs, x, label, tmp


def _export(path, run, out):
    return CliRunner().invoke(app, ["export", str(path), "--run", run, "-o", str(out)])


def _readme_digest(arrays: dict) -> str:
    # README "runs.parquet", param_hash: for each array under params/ and state/, in sorted
    # order of its key path written ['params']['l1']['W'], SHA-256 is fed
    # "<key path>|<numpy dtype.str>|<shape as a Python tuple>|" and then the array's raw bytes.
    h = hashlib.sha256()
    paths = {"".join(f"['{p}']" for p in name.split("/")): a for name, a in arrays.items()
             if name.split("/")[0] in ("params", "state")}
    for key in sorted(paths):
        a = np.ascontiguousarray(paths[key])
        h.update(f"{key}|{a.dtype.str}|{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _predict(arrays: dict, x: np.ndarray) -> np.ndarray:
    # An MLP in inference mode as the README's spec language describes it: affine map, then batch
    # normalization with its running statistics (Ioffe & Szegedy 2015, Alg. 2; no bias before it),
    # then the activation; the output layer affine; class = argmax of the scores.
    h = (x - arrays["input/mean"]) / arrays["input/scale"]
    layers = sorted({n.split("/")[1] for n in arrays if n.startswith("params/")}, key=lambda s: int(s[1:]))
    for name in layers[:-1]:
        p = lambda k: arrays[f"params/{name}/{k}"]
        u = h @ p("W")
        mean, var = arrays[f"state/{name}/mean"], arrays[f"state/{name}/var"]
        h = np.tanh(p("gamma") * (u - mean) / np.sqrt(var + np.float32(1e-5)) + p("beta"))
    out = layers[-1]
    return np.argmax(h @ arrays[f"params/{out}/W"] + arrays[f"params/{out}/b"], axis=1)


def test_exported_arrays_have_the_stored_digest_and_reproduce_the_validation_accuracy(study):
    path, runs, x, label, tmp = study
    row = runs.iloc[1]
    out = tmp / "winner.npz"
    result = _export(path, row.run_id, out)
    assert result.exit_code == 0, result.output
    assert result.stdout.strip().endswith("winner.npz")
    with np.load(out, allow_pickle=False) as archive:  # plain numpy, no pickle
        arrays = {k: archive[k] for k in archive.files}
    assert str(arrays["lesion/run_id"]) == row.run_id
    assert {"params/l1/W", "params/l1/gamma", "state/l1/mean", "state/l2/var", "params/l3/b"} <= set(arrays)
    assert _readme_digest(arrays) == row.param_hash
    val = arrays["split/validation"]
    assert len(val) == 50 and len(set(val.tolist())) == 50
    accuracy = np.mean(_predict(arrays, x[val]) == label[val])
    assert accuracy == pytest.approx(float(row.final_val_accuracy), abs=1e-6)


def test_unknown_or_ambiguous_run_is_one_line_exit_2_and_nothing_written(study):
    path, runs, x, label, tmp = study
    out = tmp / "none.npz"
    # one variant, two seeds: the 16-hex variant part of the run id matches both runs
    for run, message in (("0000deadbeef", "no such run"), (runs.run_id[0][:16], "matches 2 runs")):
        result = _export(path, run, out)
        assert result.exit_code == 2
        assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.output
        assert message in result.stderr
    assert not out.exists()


def test_a_stored_digest_that_differs_is_refused_and_nothing_written(study):
    path, runs, x, label, tmp = study
    import pyarrow as pa

    # a copy of the result set whose stored digest of one run was altered
    copy = tmp / "altered"
    copy.mkdir()
    table = pq.read_table(path / "runs.parquet")
    digests = table.column("param_hash").to_pylist()
    digests[0] = "0" * 64
    table = table.set_column(table.column_names.index("param_hash"), "param_hash", pa.array(digests))
    pq.write_table(table, copy / "runs.parquet")
    (copy / "curves.parquet").write_bytes((path / "curves.parquet").read_bytes())
    out = tmp / "refused.npz"
    result = _export(copy, runs.run_id[0], out)
    assert result.exit_code == 2, result.output
    # the progress line, then the refusal as one line
    last = result.stderr.strip().splitlines()[-1]
    assert "do not match the stored hash" in last and last.endswith("nothing written")
    assert "Traceback" not in result.output
    assert not out.exists()
