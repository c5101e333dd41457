"""Per-class recall and macro F1 of the compiled evaluation against scikit-learn.

scikit-learn's `recall_score(average=None)` and `f1_score(average="macro")` are the reference:
random predictions and labels, with classes the model never predicts and classes the
validation labels never contain, evaluated per lane under `vmap` and `jit` as the programs do.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from sklearn.metrics import f1_score, recall_score

from compiler.build import class_scores
from compiler.spec import MACRO_F1, RECALL


def _cases(seed: int, lanes: int, n: int, classes: int):
    """Labels and predictions per lane; in each lane some classes are left out of the labels,
    others out of the predictions (and in some lanes a class is out of both)."""
    rng = np.random.default_rng(seed)
    y = np.empty((lanes, n), np.int32)
    p = np.empty((lanes, n), np.int32)
    for lane in range(lanes):
        in_labels = rng.choice(classes, size=rng.integers(1, classes + 1), replace=False)
        in_predictions = rng.choice(classes, size=rng.integers(1, classes + 1), replace=False)
        y[lane] = rng.choice(in_labels, size=n)
        # partly right, so true positives occur
        p[lane] = np.where(rng.random(n) < 0.5, y[lane], rng.choice(in_predictions, size=n))
        if lane % 2:  # a class of the labels that the model never predicts
            c = y[lane, 0]
            p[lane][p[lane] == c] = (c + 1) % classes
    return y, p


@pytest.mark.parametrize("classes, n", [(2, 7), (3, 40), (5, 13), (10, 300)])
def test_recall_and_macro_f1_equal_scikit_learn(classes, n):
    y, p = _cases(classes * 1000 + n, lanes=24, n=n, classes=classes)
    out = jax.jit(jax.vmap(lambda pred, lab: class_scores(pred, lab, classes)))(jnp.asarray(p), jnp.asarray(y))
    absent_somewhere = never_predicted_somewhere = False
    for lane in range(len(y)):
        # scikit-learn recall_score(average=None) over every class index; zero_division=0 is its
        # default ("warn" returns 0 and warns) written out
        want_recall = recall_score(y[lane], p[lane], labels=range(classes), average=None, zero_division=0)
        got_recall = np.array([out[f"{RECALL}{k}"][lane] for k in range(classes)])
        # tp / support of two exact integer counts, rounded once to float32: the same bits
        np.testing.assert_array_equal(got_recall, want_recall.astype(np.float32))
        # scikit-learn f1_score(average="macro") with labels left out: the mean over the classes
        # that occur in the labels or the predictions
        want_f1 = f1_score(y[lane], p[lane], average="macro")
        np.testing.assert_allclose(float(out[MACRO_F1][lane]), want_f1, rtol=2e-6)
        absent_somewhere |= len(set(y[lane])) < classes
        never_predicted_somewhere |= bool(set(y[lane]) - set(p[lane]))
    assert absent_somewhere and never_predicted_somewhere  # the cases this test is about occurred


def test_zero_division_convention_is_scikit_learns_default():
    # A class absent from the labels: recall 0/0. scikit-learn's default zero_division ("warn")
    # returns 0, which lesion stores; zero_division=1 or nan would be other conventions.
    y = np.array([0, 0, 1, 1], np.int32)
    p = np.array([0, 2, 1, 1], np.int32)
    out = class_scores(jnp.asarray(p), jnp.asarray(y), 4)
    assert [float(out[f"{RECALL}{k}"]) for k in range(4)] == [0.5, 1.0, 0.0, 0.0]
    with pytest.warns(Warning):
        assert recall_score(y, p, labels=range(4), average=None).tolist() == [0.5, 1.0, 0.0, 0.0]
    assert recall_score(y, p, labels=range(4), average=None, zero_division=1).tolist()[2:] == [1.0, 1.0]
    # Macro F1 averages classes 0, 1 and 2 (2 is predicted once, never right: F1 0); class 3 is in
    # neither and left out, so zero_division never enters it (scikit-learn gives the same for any).
    f1 = [2 * 1 / (2 + 1), 1.0, 0.0]
    assert float(out[MACRO_F1]) == pytest.approx(np.mean(f1), rel=1e-6)
    for zd in (0, 1):
        assert f1_score(y, p, average="macro", zero_division=zd) == pytest.approx(np.mean(f1))


def test_every_value_is_finite_so_health_is_not_touched():
    # A lane whose predictions are one class only, and labels of one other class only.
    out = class_scores(jnp.zeros(9, jnp.int32), jnp.full(9, 2, jnp.int32), 3)
    assert all(np.isfinite(float(v)) for v in out.values())
    assert float(out[MACRO_F1]) == 0.0  # scikit-learn: f1_score([2]*9, [0]*9, average="macro") == 0
    assert f1_score([2] * 9, [0] * 9, average="macro") == 0.0
