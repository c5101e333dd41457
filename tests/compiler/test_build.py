"""The compiled program: contract, pairing, determinism, health and convex reference optima."""

import hashlib
import pathlib
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.stats
from sklearn.datasets import load_diabetes, load_digits, load_iris
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.preprocessing import StandardScaler

from compiler import build, model
from compiler.data import load_data
from compiler.expand import expand
from compiler.hashing import KNOBS, program_key, study_hash
from compiler.spec import Spec

ROOT = pathlib.Path(__file__).resolve().parents[2]


def variant(**sections):
    raw = {"study": {"name": "t"}, "data": {"generator": "rings", "samples": 192, "features": 3, "classes": 3},
           "model": {"hidden": [8]}, "training": {"epochs": 3, "batch_size": 32}}
    for key, value in sections.items():
        raw[key] = {**raw.get(key, {}), **value} if isinstance(value, dict) else value
    return expand(Spec.model_validate(raw))[0].spec


def program(v, base_dir="."):
    ds = load_data(v, pathlib.Path(base_dir))
    return build.compile_program([v], ds), ds


def knobs(v):
    return {k: jnp.float32(x) for k, x in build.knob_vector(v).items()}


def _run_bits():
    """Digest of the final parameters and of every metric's bytes for one fixed run."""
    v = variant(normalization={"kind": "batch"}, regularization={"dropout": {"rate": 0.2}},
                optimizer={"kind": "adam", "learning_rate": 0.01})
    prog, ds = program(v)
    carry, metrics = jax.jit(prog.train)(knobs(v), build.seed_key(5), ds.x, ds.y)
    h = hashlib.sha256(b"".join(np.asarray(metrics[m]).tobytes() for m in prog.metric_names)).hexdigest()
    return f"{build.param_hash(prog.params(carry))} {h}"


# ── contract ────────────────────────────────────────────────────────────────────────────────────
@pytest.fixture(scope="module")
def base():
    v = variant(normalization={"kind": "batch"})
    prog, ds = program(v)
    carry, metrics = jax.jit(prog.train)(knobs(v), build.seed_key(0), ds.x, ds.y)
    return v, prog, ds, carry, metrics


def test_program_contract(base):
    v, prog, ds, carry, metrics = base
    assert prog.key == program_key(v) and prog.epochs == 3
    assert prog.knob_names == tuple(k for k in KNOBS if k in prog.knob_names) and "optimizer.learning_rate" in prog.knob_names
    assert prog.metric_names == ("train_divergence", "train_penalty", "val_divergence", "val_accuracy", "val_macro_f1",
                                 "val_recall_0", "val_recall_1", "val_recall_2", "grad_norm",
                                 "grad_norm_layer1", "grad_norm_layer2", "weight_norm", "learning_rate")
    for name in prog.metric_names:
        assert metrics[name].shape == (3,) and metrics[name].dtype == jnp.float32
        assert np.all(np.isfinite(metrics[name]))
    assert set(metrics) == set(prog.metric_names)
    diverged, at = prog.status(carry)
    assert not bool(diverged) and int(at) == -1
    assert set(prog.params(carry)) == {"params", "state"} and set(prog.params(carry)["state"]["l1"]) == {"mean", "var"}
    assert int(carry.train_idx.shape[0]) == 144 and int(carry.val_idx.shape[0]) == 48  # train_size(192, 0.25)
    assert sorted(np.concatenate([carry.train_idx, carry.val_idx]).tolist()) == list(range(192))
    np.testing.assert_allclose(metrics["learning_rate"], 0.05)


def test_standardization_is_fitted_on_the_training_rows(base):
    _, _, ds, carry, _ = base
    train = ds.x[np.asarray(carry.train_idx)].astype(np.float64)
    np.testing.assert_allclose(carry.x_mean, train.mean(0), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(carry.x_scale, train.std(0), rtol=1e-5)


@pytest.fixture(scope="module")
def digits_run(tmp_path_factory):
    """scikit-learn's digits, z-scored and written as CSV; seed 3's training rows hold pixel 56 at
    one value (its few non-zero images all fall in validation)."""
    folder = tmp_path_factory.mktemp("digits")
    digits = load_digits()
    x = StandardScaler().fit_transform(digits.data)
    header = ",".join([f"p{j}" for j in range(64)] + ["y"])
    np.savetxt(folder / "digits.csv", np.column_stack([x, digits.target]), delimiter=",", header=header,
               comments="", fmt="%.9g")

    def run(**data):
        v = expand(Spec.model_validate({
            "study": {"name": "digits"}, "data": {"kind": "file", "path": "digits.csv", **data},
            "model": {"hidden": [16]}, "training": {"epochs": 3, "batch_size": 128}}))[0].spec
        prog, ds = program(v, folder)
        carry, metrics = jax.jit(prog.train)(knobs(v), build.seed_key(3), ds.x, ds.y)
        return ds, carry, metrics
    return run


def test_near_constant_column_of_zscored_digits_is_centred_not_blown_up(digits_run):
    ds, carry, metrics = digits_run()
    train = ds.x[np.asarray(carry.train_idx)].astype(np.float64)
    assert np.ptp(train[:, 56]) == 0 and np.ptp(ds.x[np.asarray(carry.val_idx), 56]) > 10  # the case itself
    # scikit-learn StandardScaler (_is_constant_feature, _handle_zeros_in_scale): a feature constant
    # up to rounding gets scale 1; every other scale is the population standard deviation.
    reference = StandardScaler().fit(train)
    np.testing.assert_allclose(carry.x_scale, reference.scale_, rtol=1e-4)
    np.testing.assert_allclose(carry.x_mean, reference.mean_, rtol=1e-4, atol=1e-6)
    # Before the rule, pixel 56's validation values were divided by ~2e-9 and the final
    # validation divergence of this run was ~1e7. Ten classes: chance cross-entropy is ln 10 ≈ 2.3.
    assert np.all(np.isfinite(metrics["val_divergence"])) and metrics["val_divergence"][-1] < 2.3


def test_standardize_false_feeds_the_columns_as_they_are(digits_run):
    ds, carry, _ = digits_run(standardize=False)
    assert np.all(np.asarray(carry.x_mean) == 0) and np.all(np.asarray(carry.x_scale) == 1)


def test_standardize_default_keeps_study_hashes_and_false_changes_them():
    # RFC 8785 canonical JSON of the spec with defaults filled: a key added later must not change
    # the hash of specs that do not write it (common practice: a content hash is a stable name).
    def digest(**data):
        return study_hash(Spec.model_validate({"study": {"name": "h"}, "data": {"kind": "file", "path": "d.csv",
                                                                                  **data}}))
    assert digest() == digest(standardize=True) != digest(standardize=False)
    # the digest of that spec before data.standardize existed (computed on the earlier code)
    assert digest() == "8e15e4b214adc78a303c7c3eed7fa9059626785fe60f6585e2cc3a0f6f17265d"


def test_evaluate_is_the_inference_mode_validation_metric(base):
    _, prog, ds, carry, metrics = base
    idx = np.asarray(carry.val_idx)
    out = prog.evaluate(carry, ds.x[idx], ds.y[idx])
    np.testing.assert_allclose(out["accuracy"], metrics["val_accuracy"][-1], rtol=1e-6)
    np.testing.assert_allclose(out["divergence"], metrics["val_divergence"][-1], rtol=1e-5)


def test_epoch_by_epoch_equals_train_and_vmap_lanes_do_not_interact(base):
    v, prog, ds, carry, metrics = base
    epoch = jax.jit(prog.epoch)
    c = jax.jit(prog.init)(knobs(v), build.seed_key(0), ds.x, ds.y)
    for e in range(3):
        c, m = epoch(c, knobs(v), ds.x, ds.y)
        np.testing.assert_allclose(m["val_divergence"], metrics["val_divergence"][e], rtol=1e-5)
    # Lanes with other knobs and seeds beside it: lane 0 reproduces the solo run's trajectory
    # to rounding (measured: bits depend on the lane width, not on neighbours).
    k = knobs(v)
    lanes = {name: jnp.stack([x, x * 0.5]) for name, x in k.items()}
    keys = jnp.stack([build.seed_key(0), build.seed_key(1)])
    vc = jax.vmap(prog.init, in_axes=(0, 0, None, None))(lanes, keys, ds.x, ds.y)
    vep = jax.jit(jax.vmap(prog.epoch, in_axes=(0, 0, None, None)))
    for e in range(3):
        vc, vm = vep(vc, lanes, ds.x, ds.y)
        np.testing.assert_allclose(vm["val_divergence"][0], metrics["val_divergence"][e], rtol=1e-4)


# ── one program per program key ───────────────────────────────────────────────────────────────
def test_knobs_are_traced_one_trace_for_all_values():
    a = variant(optimizer={"kind": "sgd", "learning_rate": 0.01, "momentum": 0.0},
                regularization={"weight_decay": 0.0, "dropout": {"rate": 0.0}})
    b = variant(optimizer={"kind": "sgd", "learning_rate": 0.3, "momentum": 0.9},
                regularization={"weight_decay": 0.01, "dropout": {"rate": 0.3}})
    assert program_key(a) == program_key(b)
    # Built for both: a program built for a alone leaves out the work a's zero knobs make the
    # identity (the dropout masks), and packing b's lanes for it is refused.
    ds = load_data(a, pathlib.Path("."))
    prog = build.compile_program([a, b], ds)
    traces = []

    def epoch(*args):
        traces.append(1)
        return prog.epoch(*args)
    step = jax.jit(epoch)
    ca = prog.init(knobs(a), build.seed_key(0), ds.x, ds.y)
    ma = step(ca, knobs(a), ds.x, ds.y)[1]
    mb = step(ca, knobs(b), ds.x, ds.y)[1]
    assert len(traces) == 1
    np.testing.assert_allclose(ma["learning_rate"], 0.01)
    np.testing.assert_allclose(mb["learning_rate"], 0.3)
    assert float(ma["train_penalty"]) == 0.0 and float(mb["train_penalty"]) > 0.0


# ── pairing ─────────────────────────────────────────────────────────────────────────────────────
def test_same_seed_pairs_split_init_and_batch_order():
    a = variant(optimizer={"kind": "sgd", "learning_rate": 0.01})
    b = variant(optimizer={"kind": "sgd", "learning_rate": 0.1})
    pa, ds = program(a)
    pb, _ = program(b)
    ca = pa.init(knobs(a), build.seed_key(3), ds.x, ds.y)
    cb = pb.init(knobs(b), build.seed_key(3), ds.x, ds.y)
    jax.tree.map(np.testing.assert_array_equal, pa.params(ca), pb.params(cb))
    np.testing.assert_array_equal(ca.train_idx, cb.train_idx)
    order = lambda c: build.permutation(jax.random.fold_in(c.shuffle_key, 0), 144)
    np.testing.assert_array_equal(order(ca), order(cb))  # the batch order of epoch 0
    np.testing.assert_array_equal(jax.random.key_data(ca.dropout_key), jax.random.key_data(cb.dropout_key))
    other = pa.init(knobs(a), build.seed_key(4), ds.x, ds.y)
    assert not np.array_equal(other.train_idx, ca.train_idx)
    assert not np.array_equal(other.params["l1"]["W"], ca.params["l1"]["W"])


def test_batch_and_no_normalization_share_dense_weights():
    a, b = variant(normalization={"kind": "none"}), variant(normalization={"kind": "batch"})
    pa, ds = program(a)
    pb, _ = program(b)
    ca = pa.init(knobs(a), build.seed_key(2), ds.x, ds.y)
    cb = pb.init(knobs(b), build.seed_key(2), ds.x, ds.y)
    for layer in ("l1", "l2"):
        np.testing.assert_array_equal(ca.params[layer]["W"], cb.params[layer]["W"])
    np.testing.assert_array_equal(ca.train_idx, cb.train_idx)


# ── determinism ─────────────────────────────────────────────────────────────────────────────────
def test_bit_identical_in_one_process_and_across_processes():
    first = _run_bits()
    assert _run_bits() == first
    code = (f"import sys; sys.path.insert(0, {str(pathlib.Path(__file__).parent)!r}); "
            "import test_build; print(test_build._run_bits())")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip().splitlines()[-1] == first


def test_param_digest_is_order_free_and_sees_dtype_and_shape():
    tree = {"b": np.zeros(3, np.float32), "a": {"W": np.ones((2, 2), np.float32)}}
    same = {"a": {"W": np.ones((2, 2), np.float32)}, "b": np.zeros(3, np.float32)}
    assert build.param_hash(tree) == build.param_hash(same)
    assert build.param_hash(tree) != build.param_hash({**tree, "b": np.zeros(3, np.float64)})
    assert build.param_hash(tree) != build.param_hash({**tree, "a": {"W": np.ones((4,), np.float32)}})
    assert len(build.param_hash(tree)) == 64


def test_knob_vector_is_float32_in_knobs_order():
    v = variant(optimizer={"kind": "adam", "learning_rate": 0.002, "schedule": {"kind": "cosine", "final_fraction": 0.1}})
    kv = build.knob_vector(v)
    assert list(kv) == [k for k in KNOBS if k in kv]
    assert all(type(x) is np.float32 for x in kv.values())
    assert kv["optimizer.learning_rate"] == np.float32(0.002) and kv["optimizer.schedule.final_fraction"] == np.float32(0.1)


# ── a program owns its inputs ─────────────────────────────────────────────────────────────────
def test_a_program_packs_its_lanes_and_knows_its_zero_knobs():
    a = variant(regularization={"dropout": {"rate": 0.0}})
    b = variant(regularization={"dropout": {"rate": 0.2}}, optimizer={"kind": "sgd", "learning_rate": 0.01})
    ds = load_data(a, pathlib.Path("."))
    prog = build.compile_program([a, b], ds)
    assert prog.zero_knobs == {"regularization.weight_decay", "optimizer.momentum", "divergence.label_smoothing"}
    packed = prog.pack([a, b, a])
    assert tuple(packed) == prog.knob_names
    assert all(values.dtype == jnp.float32 and values.shape == (3,) for values in packed.values())
    np.testing.assert_array_equal(packed["regularization.dropout.rate"], np.float32([0.0, 0.2, 0.0]))
    np.testing.assert_array_equal(packed["optimizer.learning_rate"], np.float32([0.05, 0.01, 0.05]))
    # Built for rate 0 alone, the program may have left the masks out: b's rate cannot run on it.
    with pytest.raises(ValueError, match="regularization.dropout.rate"):
        build.compile_program([a], ds).pack([a, b])


def test_one_program_serves_one_program_key():
    a, other = variant(), variant(normalization={"kind": "layer"})
    ds = load_data(a, pathlib.Path("."))
    with pytest.raises(ValueError, match="several program keys"):
        build.compile_program([a, other], ds)
    with pytest.raises(ValueError, match=program_key(other)):
        build.compile_program([a], ds).pack([a, other])


# ── health ──────────────────────────────────────────────────────────────────────────────────────
def test_absurd_learning_rate_is_reported_diverged_with_finite_params():
    v = variant(optimizer={"kind": "sgd", "learning_rate": 1e6}, training={"epochs": 4})
    prog, ds = program(v)
    carry, metrics = jax.jit(prog.train)(knobs(v), build.seed_key(0), ds.x, ds.y)
    diverged, at = prog.status(carry)
    assert bool(diverged) and 0 <= int(at) < 4
    for name in prog.metric_names:
        assert np.all(np.isnan(metrics[name][int(at):]))
        assert np.all(np.isfinite(metrics[name][:int(at)]))
    assert all(np.all(np.isfinite(leaf)) for leaf in jax.tree.leaves(prog.params(carry)))


# ── partial batches ─────────────────────────────────────────────────────────────────────────────
def test_partial_last_batch_means_over_real_examples():
    # 144 training rows in batches of 40: 3 full steps and one of 24 real rows (padded to 40).
    # With a vanishing learning rate every step sees the initial weights, so the epoch's
    # train_divergence is the mean of four per-batch means computed here in numpy.
    v = variant(optimizer={"kind": "sgd", "learning_rate": 1e-30}, divergence={"kind": "kl"},
                training={"batch_size": 40, "drop_last": False, "epochs": 1})
    prog, ds = program(v)
    c = prog.init(knobs(v), build.seed_key(1), ds.x, ds.y)
    _, m = jax.jit(prog.epoch)(c, knobs(v), ds.x, ds.y)
    order = np.asarray(c.train_idx)[np.asarray(build.permutation(jax.random.fold_in(c.shuffle_key, 0), 144))]
    p = jax.tree.map(np.asarray, c.params)
    x = (ds.x - np.asarray(c.x_mean)) / np.asarray(c.x_scale)
    z = np.maximum(x @ p["l1"]["W"] + p["l1"]["b"], 0) @ p["l2"]["W"] + p["l2"]["b"]
    logp = z - np.log(np.exp(z - z.max(1, keepdims=True)).sum(1, keepdims=True)) - z.max(1, keepdims=True)
    ce = -logp[np.arange(len(ds.y)), ds.y]
    means = [ce[order[i:i + 40]].mean() for i in range(0, 144, 40)]
    np.testing.assert_allclose(m["train_divergence"], np.mean(means), rtol=1e-5)


def test_epoch_metrics_are_the_means_of_the_per_step_values():
    # The epoch's training metrics are running sums in the scan's carry, divided by the steps
    # once. Reference: the same epoch written out step by step in float64 numpy (forward,
    # backward, the L2 penalty, SGD with momentum as optax.trace: v ← g + μv, θ ← θ − ηv), each
    # step's divergence, penalty and gradient norms kept and averaged at the end. float32 carries
    # a relative rounding of u = 2⁻²⁴ per operation (IEEE 754); sums and dot products of n ≤ 16
    # terms err by at most γ_n ≈ n·u ≈ 1e-6 (Higham 2002, §3.1), and nine steps compound it
    # little: rtol 1e-5 for the metrics, 1e-4 for the parameters after the epoch.
    lr, mu, lam = 0.1, 0.9, 0.01
    v = variant(optimizer={"kind": "sgd", "learning_rate": lr, "momentum": mu}, divergence={"kind": "kl"},
                regularization={"weight_decay": lam}, training={"batch_size": 16, "epochs": 1})
    prog, ds = program(v)
    c = prog.init(knobs(v), build.seed_key(2), ds.x, ds.y)
    after, m = jax.jit(prog.epoch)(c, knobs(v), ds.x, ds.y)
    n_train = len(np.asarray(c.train_idx))
    order = np.asarray(c.train_idx)[np.asarray(build.permutation(jax.random.fold_in(c.shuffle_key, 0), n_train))]
    x_all = (ds.x.astype(np.float64) - np.asarray(c.x_mean)) / np.asarray(c.x_scale)
    p = {k: {n: np.asarray(a, np.float64) for n, a in layer.items()} for k, layer in c.params.items()}
    vel = {k: {n: np.zeros_like(a) for n, a in layer.items()} for k, layer in p.items()}
    steps = {"train_divergence": [], "train_penalty": [], "grad_norm": [], "grad_norm_layer1": [], "grad_norm_layer2": []}
    for i in range(0, n_train - 15, 16):
        x, y = x_all[order[i:i + 16]], ds.y[order[i:i + 16]]
        u = x @ p["l1"]["W"] + p["l1"]["b"]
        h = np.maximum(u, 0)
        z = h @ p["l2"]["W"] + p["l2"]["b"]
        z = z - z.max(1, keepdims=True)
        prob = np.exp(z) / np.exp(z).sum(1, keepdims=True)
        steps["train_divergence"].append(-np.log(prob[np.arange(16), y]).mean())
        steps["train_penalty"].append(0.5 * lam * sum(np.sum(p[k]["W"] ** 2) for k in p))
        dz = (prob - np.eye(prob.shape[1])[y]) / 16
        du = (dz @ p["l2"]["W"].T) * (u > 0)
        g = {"l1": {"W": x.T @ du + lam * p["l1"]["W"], "b": du.sum(0)},
             "l2": {"W": h.T @ dz + lam * p["l2"]["W"], "b": dz.sum(0)}}
        layer_sq = {k: sum(np.sum(a ** 2) for a in g[k].values()) for k in g}
        steps["grad_norm"].append(np.sqrt(sum(layer_sq.values())))
        for k in g:
            steps[f"grad_norm_layer{k[1:]}"].append(np.sqrt(layer_sq[k]))
            for n in g[k]:
                vel[k][n] = g[k][n] + mu * vel[k][n]
                p[k][n] = p[k][n] - lr * vel[k][n]
    assert len(steps["grad_norm"]) == n_train // 16 == 9
    for name, values in steps.items():
        np.testing.assert_allclose(m[name], np.mean(values), rtol=1e-5, err_msg=name)
    for k in p:
        for n in p[k]:
            np.testing.assert_allclose(after.params[k][n], p[k][n], rtol=1e-4, atol=1e-6, err_msg=f"{k}/{n}")


# ── every kind makes progress ───────────────────────────────────────────────────────────────────
PROGRESS = {
    "kl+sgd-momentum-nesterov": dict(optimizer={"kind": "sgd", "learning_rate": 0.1, "momentum": 0.9, "nesterov": True}),
    "bce+adam+exponential": dict(data={"classes": 2}, divergence={"kind": "bce"},
                                 optimizer={"kind": "adam", "learning_rate": 0.01, "schedule": {"kind": "exponential", "rate": 0.9}}),
    "batch+adamw+cosine": dict(normalization={"kind": "batch"}, regularization={"weight_decay": 0.01, "decoupled": True},
                               optimizer={"kind": "adamw", "learning_rate": 0.01, "schedule": {"kind": "cosine"}}),
    "layer+rmsprop+warmup": dict(normalization={"kind": "layer"}, optimizer={"kind": "rmsprop", "learning_rate": 0.003,
                                 "momentum": 0.5, "schedule": {"kind": "warmup_cosine", "warmup_epochs": 1}}),
    "scaled-dropout+l2-penalty": dict(regularization={"weight_decay": 0.001, "dropout": {"rate": 0.2, "kind": "scaled"}},
                                      optimizer={"kind": "sgd", "learning_rate": 0.1, "momentum": 0.9}),
    "dropconnect+decoupled-sgd": dict(regularization={"weight_decay": 0.001, "decoupled": True, "dropout": {"rate": 0.2, "kind": "dropconnect"}},
                                      optimizer={"kind": "sgd", "learning_rate": 0.1, "momentum": 0.9}),
    "l2+friedman1+gelu": dict(data={"generator": "friedman1", "features": 5}, divergence={"kind": "l2"},
                              study={"metric": "val_rmse"}, model={"activation": "gelu", "init": "glorot_uniform"},
                              optimizer={"kind": "adam", "learning_rate": 0.01}),
    "huber+sines+tanh": dict(data={"generator": "sines", "features": 2}, divergence={"kind": "huber", "delta": 0.5},
                             study={"metric": "val_rmse"}, model={"activation": "tanh", "init": "he_uniform"},
                             optimizer={"kind": "adam", "learning_rate": 0.01}),
}


@pytest.mark.parametrize("name", sorted(PROGRESS))
def test_every_kind_trains(name):
    v = variant(training={"epochs": 6, "batch_size": 16}, **PROGRESS[name])
    prog, ds = program(v)
    carry, m = jax.jit(prog.train)(knobs(v), build.seed_key(0), ds.x, ds.y)
    assert not bool(prog.status(carry)[0])
    assert m["val_divergence"][-1] < m["val_divergence"][0]
    assert m["train_divergence"][-1] < m["train_divergence"][0]
    if v.regularization.decoupled:
        assert np.all(np.asarray(m["train_penalty"]) == 0.0)
    if v.optimizer.schedule.kind == "exponential":
        steps = 144 // 16  # lr at the last step of each epoch: η·rate^((e·steps + steps − 1)/steps)
        e = np.arange(6)
        np.testing.assert_allclose(m["learning_rate"], 0.01 * 0.9 ** ((e * steps + steps - 1) / steps), rtol=1e-5)


# ── convex reference optima ─────────────────────────────────────────────────────────────────────
def _fit(tmp_path, x, y, task, divergence, lam, lr, epochs):
    np.savez(tmp_path / "d.npz", x=x, y=y)
    n_train = len(x) - int(round(len(x) * 0.2))
    v = expand(Spec.model_validate({
        "study": {"name": "convex", "metric": "val_accuracy" if task == "classification" else "val_rmse"},
        "data": {"kind": "file", "path": "d.npz", "task": task, "validation": 0.2},
        "model": {"hidden": []}, "divergence": {"kind": divergence},
        "regularization": {"weight_decay": lam},
        "optimizer": {"kind": "sgd", "learning_rate": lr, "momentum": 0.9},
        "training": {"epochs": epochs, "batch_size": n_train}}))[0].spec
    prog, ds = program(v, tmp_path)
    carry, metrics = jax.jit(prog.train)(knobs(v), build.seed_key(0), ds.x, ds.y)
    idx = np.asarray(carry.train_idx)
    xs = ((ds.x[idx] - np.asarray(carry.x_mean)) / np.asarray(carry.x_scale)).astype(np.float64)
    p = carry.params["l1"]
    return xs, ds.y[idx], np.asarray(p["W"], np.float64), np.asarray(p["b"], np.float64), metrics


def test_softmax_regression_reaches_the_logistic_regression_optimum(tmp_path):
    # scikit-learn user guide (LogisticRegression): minimizes C Σ CE + ½‖W‖², intercept unpenalized;
    # dividing by nC gives mean CE + λ/2‖W‖² with C = 1/(nλ).
    iris = load_iris()
    lam = 0.01
    x, y, w, b, metrics = _fit(tmp_path, iris.data, iris.target, "classification", "kl", lam, 0.5, 1500)
    n = len(x)

    def objective(w, b):
        z = x @ w + b
        z = z - z.max(1, keepdims=True)
        logp = z - np.log(np.exp(z).sum(1, keepdims=True))
        return -logp[np.arange(n), y].mean() + lam / 2 * np.sum(w ** 2)

    ref = LogisticRegression(C=1 / (n * lam), tol=1e-12, max_iter=100_000).fit(x, y)
    ours, theirs = objective(w, b), objective(ref.coef_.T, ref.intercept_)
    assert abs(ours - theirs) < 1e-5 * theirs  # float32 training vs float64 L-BFGS
    np.testing.assert_allclose(metrics["train_divergence"][-1] + metrics["train_penalty"][-1], ours, rtol=1e-4)
    # the optimum by its gradient: ∇_W = Xᵀ(softmax − onehot)/n + λW, ∇_b = mean(softmax − onehot)
    z = x @ w + b
    s = np.exp(z - z.max(1, keepdims=True))
    err = s / s.sum(1, keepdims=True) - np.eye(3)[y]
    assert np.linalg.norm(x.T @ err / n + lam * w) < 1e-3 and np.linalg.norm(err.mean(0)) < 1e-3


def test_linear_l2_reaches_the_ridge_optimum(tmp_path):
    # scikit-learn Ridge minimizes ‖y − Xw‖² + α‖w‖² (intercept unpenalized); dividing by 2n gives
    # mean ½(y − ŷ)² + λ/2‖w‖² with α = nλ.
    diabetes = load_diabetes()
    lam = 0.1
    x, y, w, b, _ = _fit(tmp_path, diabetes.data, diabetes.target[:, None], "regression", "l2", lam, 0.2, 1500)
    n = len(x)
    objective = lambda w, b: 0.5 * np.mean((x @ w + b - y) ** 2) + lam / 2 * np.sum(w ** 2)
    ref = Ridge(alpha=n * lam).fit(x, y[:, 0])
    ours, theirs = objective(w, b), objective(ref.coef_[:, None], ref.intercept_)
    assert abs(ours - theirs) < 1e-5 * theirs
    np.testing.assert_allclose(w[:, 0], ref.coef_, rtol=1e-3, atol=1e-2)


def test_permutation_is_a_uniform_shuffle():
    n, trials = 6, 3000
    perms = np.asarray(jax.vmap(lambda k: build.permutation(k, n))(jax.random.split(jax.random.key(0), trials)))
    assert perms.dtype == np.int32
    assert (np.sort(perms, axis=1) == np.arange(n)).all()
    # every element lands in every position equally often: chi-square test of uniformity
    # (scipy.stats.chisquare), one per element; a broken shuffle (e.g. identity) gives p ≈ 0
    for element in range(n):
        counts = np.bincount(np.argmax(perms == element, axis=1), minlength=n)
        assert scipy.stats.chisquare(counts).pvalue > 1e-4
