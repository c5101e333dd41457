"""Per-class recall and macro F1 end to end: a study on scikit-learn's bundled digits (via a data
file), its stored metrics checked against scikit-learn on the predictions of the exported network
(plain numpy forward pass), and every reader's handling of the new metric names."""

from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_digits
from sklearn.metrics import f1_score, recall_score
from typer.testing import CliRunner

from compiler.data import DataError, load_data
from compiler.loader import load_study
from runtime.cli import app
from runtime.runner import run_study

SPEC = """
[study]
name = "digit-sorter"
seeds = 3
metric = "{metric}"

[data]
kind = "file"
path = "digits.npz"
target = "label"
validation = 0.25

[model]
hidden = [16]

[optimizer]
kind = "sgd"
learning_rate = 0.05
momentum = 0.9

[training]
epochs = 3
batch_size = 64

[ablation]
mode = "grid"

[[ablation.axis]]
key = "optimizer.learning_rate"
values = [0.01, 0.05]
"""

STORED = Path(__file__).resolve().parents[1] / "fixtures" / "stored"


def _write(tmp: Path, metric: str) -> Path:
    digits = load_digits()  # scikit-learn's bundled 8×8 digits: 1797 rows, 64 features, 10 classes
    columns = {f"p{i}": digits.data[:, i] for i in range(64)}
    np.savez(tmp / "digits.npz", label=digits.target, **columns)
    spec = tmp / "digits.toml"
    spec.write_text(SPEC.format(metric=metric))
    return spec


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("digits")
    path = run_study(load_study(_write(tmp, "val_recall_8")), tmp / "r").path
    runs = pq.read_table(path / "runs.parquet").to_pandas()  # read back with pyarrow, not lesion
    curves = pq.read_table(path / "curves.parquet").to_pandas()
    return path, runs, curves, load_digits(), tmp


def _predict(arrays: dict, x: np.ndarray) -> np.ndarray:
    # An MLP in inference mode as the README describes it: standardize with the run's training
    # statistics, affine then ReLU per hidden layer, the output layer affine, class = argmax.
    h = (x.astype(np.float32) - arrays["input/mean"]) / arrays["input/scale"]
    layers = sorted({n.split("/")[1] for n in arrays if n.startswith("params/")}, key=lambda s: int(s[1:]))
    for name in layers[:-1]:
        h = np.maximum(h @ arrays[f"params/{name}/W"] + arrays[f"params/{name}/b"], 0)
    out = layers[-1]
    return np.argmax(h @ arrays[f"params/{out}/W"] + arrays[f"params/{out}/b"], axis=1)


def test_columns_per_class_in_curves_and_runs(study):
    path, runs, curves, digits, tmp = study
    per_class = [f"val_recall_{k}" for k in range(10)]
    assert set(per_class + ["val_macro_f1"]) <= set(curves.columns)
    assert {f"final_{m}" for m in per_class + ["val_macro_f1"]} <= set(runs.columns)
    assert "best_val_recall_8" in runs.columns  # the headline's best epoch is chosen by it
    for _, row in runs.iterrows():
        c = curves[curves.run_id == row.run_id].sort_values("epoch")
        assert row.best_val_recall_8 == c.val_recall_8.max()
        assert c.val_recall_8.iloc[row.best_epoch - 1] == row.best_val_recall_8


def test_stored_recall_and_macro_f1_equal_scikit_learn_on_the_exported_network(study):
    path, runs, curves, digits, tmp = study
    for _, row in runs.drop_duplicates("variant_hash").iterrows():  # each export re-executes its run
        out = tmp / f"{row.run_id}.npz"
        result = CliRunner().invoke(app, ["export", str(path), "--run", row.run_id, "-o", str(out)])
        assert result.exit_code == 0, result.output
        with np.load(out, allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in archive.files}
        val = arrays["split/validation"]
        y, predicted = digits.target[val], _predict(arrays, digits.data[val])
        # the same predictions as the stored accuracy
        assert np.mean(predicted == y) == pytest.approx(float(row.final_val_accuracy), abs=1e-6)
        # scikit-learn recall_score(average=None), one value per class
        want = recall_score(y, predicted, labels=range(10), average=None, zero_division=0)
        got = np.array([row[f"final_val_recall_{k}"] for k in range(10)])
        np.testing.assert_array_equal(got, want.astype(np.float32))
        # scikit-learn f1_score(average="macro")
        assert float(row.final_val_macro_f1) == pytest.approx(f1_score(y, predicted, average="macro"), rel=2e-6)


def test_readers_take_the_new_metrics(study):
    path, runs, curves, digits, tmp = study
    runner = CliRunner()
    for args in (["show", str(path), "--metric", "val_macro_f1"],
                 ["show", str(path), "--runs", "--metric", "val_recall_9"],
                 ["show", str(path), "--curves", "--metric", "val_recall_0"],
                 ["diff", str(path), "--metric", "val_macro_f1", "--metric", "val_recall_3"],
                 ["seeds", str(path), "--metric", "val_recall_8", "--margin", "0.05"]):
        out = runner.invoke(app, args, env={"COLUMNS": "80"})
        assert out.exit_code == 0, (args, out.output)
        if args[0] != "seeds":  # seeds prints one row per comparison, unfitted, for any metric
            assert all(len(line) <= 80 for line in out.stdout.splitlines()), out.stdout
    out = runner.invoke(app, ["show", str(path)])
    assert "val_recall_8" in out.stdout  # the study's headline


def test_a_class_beyond_the_data_is_one_located_line(study):
    path, runs, curves, digits, tmp = study
    out = CliRunner().invoke(app, ["show", str(path), "--metric", "val_recall_10"])
    assert out.exit_code == 2 and "Traceback" not in out.output
    assert "'val_recall_10' names class 10 but there are 10 classes" in out.stderr
    assert "use val_recall_0 … val_recall_9" in out.stderr


def test_a_file_target_with_fewer_classes_refuses_the_metric_before_running(tmp_path):
    spec = _write(tmp_path, "val_recall_12")
    study = load_study(spec)  # the labels are only known once the file is read
    with pytest.raises(DataError, match=r"digits\.npz: study\.metric: 'val_recall_12' names class 12 but there "
                                        r"are 10 classes .*; use val_recall_0 … val_recall_9"):
        load_data(study.variants[0].spec, tmp_path)
    out = CliRunner().invoke(app, ["run", str(spec), "--out", str(tmp_path / "r"), "--quiet"])
    assert out.exit_code == 2 and "Traceback" not in out.output
    assert not (tmp_path / "r").exists()  # nothing was created


def test_result_sets_stored_before_the_metrics_say_they_lack_them():
    # (that their replay stays identical and names the metrics it did not compare is checked
    # where the stored result sets are replayed: test_stored_bits.py)
    classification = next(STORED.glob("bits-guard-1*"))
    out = CliRunner().invoke(app, ["diff", str(classification), "--baseline", "0", "--metric", "val_macro_f1"])
    assert out.exit_code == 2 and "Traceback" not in out.output
    assert "did not compute this metric yet" in out.stderr
    regression = next(STORED.glob("bits-guard-regression-*"))
    out = CliRunner().invoke(app, ["show", str(regression), "--metric", "val_recall_0"])
    assert out.exit_code == 2 and "'val_recall_0' does not exist for a regression task" in out.stderr
