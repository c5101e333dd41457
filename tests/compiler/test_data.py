"""Data: generators against their definitions and scikit-learn, files in three formats, errors."""

import hashlib

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats
from sklearn.datasets import make_friedman1
from sklearn.linear_model import LogisticRegression
from sklearn.neighbors import KNeighborsClassifier

from compiler.data import GENERATORS, DataError, load_data
from compiler.spec import Spec, SyntheticData


def _synthetic(**data):
    task_div = "l2" if data.get("generator") in ("friedman1", "sines") else "kl"
    metric = "val_rmse" if task_div == "l2" else "val_accuracy"
    return Spec.model_validate({"study": {"name": "d", "metric": metric}, "data": data,
                                "divergence": {"kind": task_div}, "training": {"batch_size": 8}})


def _file(path, **data):
    task = data.get("task", "classification")
    return Spec.model_validate({
        "study": {"name": "d", "metric": "val_accuracy" if task == "classification" else "val_rmse"},
        "data": {"kind": "file", "path": path, **data},
        "divergence": {"kind": "kl" if task == "classification" else "l2"}, "training": {"batch_size": 2}})


def test_generator_table_matches_spec_literal():
    import typing
    assert set(typing.get_args(SyntheticData.model_fields["generator"].annotation)) == set(GENERATORS)


@pytest.mark.parametrize("generator", sorted(GENERATORS))
def test_generators_are_deterministic_typed_and_seeded(generator):
    a = load_data(_synthetic(generator=generator, samples=200, features=6, seed=3), ".")
    b = load_data(_synthetic(generator=generator, samples=200, features=6, seed=3), ".")
    c = load_data(_synthetic(generator=generator, samples=200, features=6, seed=4), ".")
    assert a.data_hash == b.data_hash != c.data_hash
    np.testing.assert_array_equal(a.x, b.x)
    shaped = {"glyphs": (12, 12, 1)}  # its default data.shape; the vector generators draw data.features
    assert a.x.dtype == np.float32 and a.x.shape == (200, *shaped.get(generator, (6,)))
    if a.task == "classification":
        assert a.y.dtype == np.int32 and a.y.shape == (200,) and a.classes == 3
        assert np.bincount(a.y).tolist() == [67, 67, 66]  # balanced classes
    else:
        assert a.y.dtype == np.float32 and a.y.shape == (200, 1) and a.classes is None


def test_pcg64_stream_is_the_documented_one():
    # numpy keeps PCG64 streams fixed across platforms; from memory, PCG64(0).random() starts
    # 0.6369616873214543 (numpy's documented Generator example with seed 0).
    assert np.random.Generator(np.random.PCG64(0)).random() == pytest.approx(0.6369616873214543, abs=1e-15)


def test_rings_class_is_the_ring():
    d = load_data(_synthetic(generator="rings", samples=3000, features=4, classes=4, noise=0.1), ".")
    radius = np.hypot(d.x[:, 0], d.x[:, 1])
    np.testing.assert_allclose([radius[d.y == k].mean() for k in range(4)], [1, 2, 3, 4], atol=0.02)


def test_spirals_need_a_nonlinear_classifier():
    # scikit-learn as the judge: a linear model cannot separate interleaved arms, neighbours can.
    d = load_data(_synthetic(generator="spirals", samples=2000, features=2, classes=3, noise=0.02), ".")
    knn = KNeighborsClassifier(5).fit(d.x[:1500], d.y[:1500]).score(d.x[1500:], d.y[1500:])
    linear = LogisticRegression(max_iter=1000).fit(d.x[:1500], d.y[:1500]).score(d.x[1500:], d.y[1500:])
    assert knn > 0.95 and linear < 0.7


def test_glyph_images_carry_their_class_in_the_bar_orientation():
    # Image moments (common practice): a bar's orientation is ½·atan2(2μ₁₁, μ₂₀ − μ₀₂) of its
    # intensity's central second moments; class k is drawn at angle πk/K.
    d = load_data(_synthetic(generator="glyphs", samples=300, classes=4, noise=0.0, shape=[16, 16, 2]), ".")
    assert d.x.shape == (300, 16, 16, 2)
    img = d.x[..., 0].astype(np.float64)
    yy, xx = np.meshgrid(np.arange(16), np.arange(16), indexing="ij")
    m = img.sum((1, 2))
    cy, cx = (img * yy).sum((1, 2)) / m, (img * xx).sum((1, 2)) / m
    dy, dx = yy - cy[:, None, None], xx - cx[:, None, None]
    mu20, mu02, mu11 = [(img * a * b).sum((1, 2)) / m for a, b in ((dx, dx), (dy, dy), (dx, dy))]
    angle = 0.5 * np.arctan2(2 * mu11, mu20 - mu02)
    gap = np.abs((angle - np.pi * d.y / 4 + np.pi / 2) % np.pi - np.pi / 2)
    assert np.median(gap) < 0.1 and np.mean(gap < 0.3) > 0.9
    # The second channel shows the same pattern at its own gain.
    ratio = d.x[..., 1].sum((1, 2)) / d.x[..., 0].sum((1, 2))
    assert 1 / 3 <= ratio.min() and ratio.max() <= 3


def test_glyph_signals_carry_their_class_in_the_frequency():
    # numpy's FFT: a packet of k + 1 cycles over a third of the length peaks near 3(k + 1) cycles
    # per length.
    d = load_data(_synthetic(generator="glyphs", samples=200, classes=3, noise=0.0, shape=[96, 1]), ".")
    peak = np.abs(np.fft.rfft(d.x[:, :, 0], axis=1)).argmax(axis=1)
    assert np.mean(np.abs(peak - 3 * (d.y + 1)) <= 1) > 0.9


def test_friedman1_target_and_distribution():
    d = load_data(_synthetic(generator="friedman1", samples=20000, features=7, noise=0.0), ".")
    x = d.x.astype(np.float64)
    # Friedman 1991 (as in scikit-learn's make_friedman1 docs)
    formula = 10 * np.sin(np.pi * x[:, 0] * x[:, 1]) + 20 * (x[:, 2] - 0.5) ** 2 + 10 * x[:, 3] + 5 * x[:, 4]
    np.testing.assert_allclose(d.y[:, 0], formula, rtol=1e-5, atol=1e-4)
    _, y_ref = make_friedman1(20000, 7, noise=0.0, random_state=0)
    assert scipy.stats.ks_2samp(d.y[:, 0], y_ref).pvalue > 1e-3  # same distribution as scikit-learn's
    noisy = load_data(_synthetic(generator="friedman1", samples=20000, features=7, noise=1.5), ".")
    xn = noisy.x.astype(np.float64)
    resid = noisy.y[:, 0] - (10 * np.sin(np.pi * xn[:, 0] * xn[:, 1]) + 20 * (xn[:, 2] - 0.5) ** 2 + 10 * xn[:, 3] + 5 * xn[:, 4])
    assert abs(resid.std() - 1.5) < 0.05  # 20 000 draws: σ of the sample std ≈ 0.0075


def test_blobs_cluster_around_centres():
    d = load_data(_synthetic(generator="blobs", samples=1500, features=5, classes=3, noise=0.0), ".")
    score = KNeighborsClassifier(1).fit(d.x[:1000], d.y[:1000]).score(d.x[1000:], d.y[1000:])
    assert score > 0.95
    spread = np.mean([d.x[d.y == k].std(0).mean() for k in range(3)])
    assert abs(spread - 0.5) < 0.03


def test_sines_is_a_smooth_function_of_x():
    d = load_data(_synthetic(generator="sines", samples=3000, features=2, noise=0.0), ".")
    from sklearn.neighbors import KNeighborsRegressor
    r2 = KNeighborsRegressor(5).fit(d.x[:2500], d.y[:2500]).score(d.x[2500:], d.y[2500:])
    assert r2 > 0.95


@pytest.fixture
def table():
    rng = np.random.default_rng(0)
    return {"a": rng.normal(size=12), "b": rng.integers(0, 5, 12).astype(np.int64),
            "label": np.array(["pear", "fig", "apple"] * 4)}


def test_csv_parquet_npz_agree_and_hash_the_bytes(tmp_path, table):
    import pyarrow.csv
    t = pa.table(table)
    pq.write_table(t, tmp_path / "t.parquet")
    pa.csv.write_csv(t, tmp_path / "t.csv")
    np.savez(tmp_path / "t.npz", a=table["a"], b=table["b"], label=np.unique(table["label"], return_inverse=True)[1])
    loaded = {ext: load_data(_file(f"t.{ext}", target="label"), tmp_path) for ext in ("parquet", "csv", "npz")}
    for ext, d in loaded.items():
        assert d.data_hash == hashlib.sha256((tmp_path / f"t.{ext}").read_bytes()).hexdigest()
        np.testing.assert_allclose(d.x, np.stack([table["a"], table["b"]], 1).astype(np.float32), rtol=1e-6)
        assert d.classes == 3 and d.y.dtype == np.int32
        # labels in sorted order: apple 0, fig 1, pear 2
        np.testing.assert_array_equal(d.y, [2, 1, 0] * 4)


def test_features_selection_and_regression_target(tmp_path, table):
    pq.write_table(pa.table(table), tmp_path / "t.parquet")
    d = load_data(_file("t.parquet", target="a", features=["b"], task="regression"), tmp_path)
    assert d.x.shape == (12, 1) and d.y.shape == (12, 1) and d.task == "regression" and d.classes is None


@pytest.mark.parametrize("problem, make, match", [
    ("missing file", lambda p: None, "data file not found"),
    ("missing column", lambda p: pq.write_table(pa.table({"a": [1.0] * 8, "c": [0, 1] * 4}), p), "target column 'y' is missing"),
    ("non-numeric", lambda p: pq.write_table(pa.table({"a": ["x"] * 8, "y": [0, 1] * 4}), p), "column 'a' is not numeric"),
    ("nan", lambda p: pq.write_table(pa.table({"a": [1.0, np.nan] * 4, "y": [0, 1] * 4}), p), "column 'a' has 4 NaN"),
    ("null", lambda p: pq.write_table(pa.table({"a": [1.0, None] * 4, "y": [0, 1] * 4}), p), "missing values"),
    ("one class", lambda p: pq.write_table(pa.table({"a": [1.0] * 8, "y": [3] * 8}), p), "1 class"),
])
def test_errors_are_one_line_and_name_the_file(tmp_path, problem, make, match):
    make(tmp_path / "d.parquet")
    with pytest.raises(DataError, match=match) as info:
        load_data(_file("d.parquet"), tmp_path)
    message = str(info.value)
    assert "\n" not in message and "d.parquet" in message
    assert isinstance(info.value, ValueError)


def test_npz_refuses_pickled_arrays(tmp_path):
    np.savez(tmp_path / "o.npz", a=np.array([{"x": 1}] * 8, dtype=object), y=np.arange(8) % 2)
    with pytest.raises(DataError, match="pickle"):
        load_data(_file("o.npz"), tmp_path)


def test_batch_larger_than_training_rows_is_a_data_error(tmp_path):
    pq.write_table(pa.table({"a": [1.0, 2.0, 3.0, 4.0], "y": [0, 1, 0, 1]}), tmp_path / "s.parquet")
    spec = _file("s.parquet").model_copy(update={"training": Spec.model_fields["training"].default.model_copy(update={"batch_size": 8})})
    with pytest.raises(DataError, match="batch_size"):
        load_data(spec, tmp_path)
