"""lesion plot on tiny result sets: valid images of the promised size, the drawn numbers equal the
result set's (read back from the figure objects), readable layout, clear errors."""

import itertools
import json
import math
import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from scipy import stats as sps
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime import plot as P
from runtime.cli import app
from runtime.runner import run_study
from runtime.show import curve_rows, summary_rows
from runtime.store import open_result_set

GRID_AXIS = '\n[[ablation.axis]]\nkey = "regularization.weight_decay"\nvalues = [0.0, 0.01]\n'

REGRESSION = """
[study]
name = "slag-depth"
seeds = 3
metric = "val_rmse"

[data]
generator = "friedman1"
samples = 200
features = 6
noise = 0.5

[model]
hidden = [8]
activation = "tanh"

[divergence]
kind = "l2"

[optimizer]
kind = "adam"
learning_rate = 0.01

[training]
epochs = 3
batch_size = 40

[ablation]
mode = "one_at_a_time"
[[ablation.axis]]
key = "regularization.weight_decay"
values = [0.001, 0.1]
"""


def _run(spec: Path, out: Path):
    return open_result_set(run_study(load_study(spec), out).path)


@pytest.fixture(scope="module")
def sets(tmp_path_factory, tiny_spec):
    tmp = tmp_path_factory.mktemp("plot")
    (tmp / "b").mkdir()
    (tmp / "slag-depth.toml").write_text(REGRESSION)
    grid = tiny_spec(tmp, "cellar", seeds=3, epochs=3, extra=GRID_AXIS)
    # B for --against: the same grid on noisier data (real differences; same program, so no recompile)
    noisy = tmp / "b" / "cellar.toml"
    noisy.write_text(grid.read_text().replace("noise = 0.5", "noise = 1.5"))
    return {
        "grid": _run(grid, tmp / "r"),
        "grid_b": _run(noisy, tmp / "rb"),
        "non_finite": _run(tiny_spec(tmp, "flare", seeds=3, epochs=3, rates="[0.05, 1e5]", extra=GRID_AXIS), tmp / "r"),
        "single": _run(tiny_spec(tmp, "lone", seeds=1, epochs=3), tmp / "r"),
        "single_grid": _run(tiny_spec(tmp, "lone-grid", seeds=1, epochs=3, extra=GRID_AXIS), tmp / "r"),
        "regression": _run(tmp / "slag-depth.toml", tmp / "r"),
        "nine": _run(tiny_spec(tmp, "vats", seeds=2, epochs=2, rates="[0.03, 0.1, 0.3]", extra=GRID_AXIS.replace(
            "[0.0, 0.01]", "[0.0, 0.001, 0.01]")), tmp / "r"),
    }


def _lines(fig, prefix: str) -> dict[str, object]:
    return {line.get_gid(): line for ax in fig.axes for line in ax.get_lines()
            if (line.get_gid() or "").startswith(prefix)}


def _subtitle(fig) -> str:
    return fig.get_suptitle()


# ── files: valid images of the expected size ─────────────────────────────────────────────────────
def _png_size(path: Path) -> tuple[int, int]:
    # PNG (ISO/IEC 15948, §5.2 signature, §11.2.2 IHDR): 8-byte signature, then the IHDR chunk
    # (length, b"IHDR", width and height as big-endian uint32).
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _svg_size(path: Path) -> tuple[float, float]:
    # SVG 1.1 §7.2: the outermost <svg> element carries width and height; matplotlib writes pt.
    root = ET.parse(path).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    w, h = root.get("width"), root.get("height")
    assert w.endswith("pt") and h.endswith("pt")
    return float(w[:-2]), float(h[:-2])


# budget draws a tuned study: tests/runtime/test_tuning.py renders it.
@pytest.mark.parametrize("kind", [k for k in P.KINDS if k != "budget"])
def test_every_kind_renders_to_png_and_svg_at_the_figure_size(sets, kind, tmp_path):
    fig = P.plot(sets["grid"], kind)
    w_in, h_in = fig.get_size_inches()
    png = P.save_figure(fig, tmp_path / f"{kind}.png")
    assert _png_size(png) == (round(w_in * P.DPI), round(h_in * P.DPI))
    svg = P.save_figure(fig, tmp_path / f"{kind}.svg")
    # 72 pt per inch (SVG 1.1 §7.10 units)
    assert _svg_size(svg) == pytest.approx((w_in * 72, h_in * 72), abs=0.01)


def test_diff_renders_to_png_and_svg(sets, tmp_path):
    fig = P.plot_diff(sets["grid"], sets["grid_b"])
    w_in, h_in = fig.get_size_inches()
    assert _png_size(P.save_figure(fig, tmp_path / "d.png")) == (round(w_in * P.DPI), round(h_in * P.DPI))
    assert _svg_size(P.save_figure(fig, tmp_path / "d.svg")) == pytest.approx((w_in * 72, h_in * 72), abs=0.01)


def test_other_suffixes_are_refused(sets, tmp_path):
    with pytest.raises(P.PlotError, match=r"\.png or \.svg"):
        P.save_figure(P.plot(sets["single"], "arms"), tmp_path / "x.pdf")


# ── the drawn numbers are the result set's ───────────────────────────────────────────────────────
def test_curve_lines_are_the_per_epoch_means_of_show_and_of_pandas(sets):
    rs = sets["grid"]
    fig = P.plot_curves(rs)
    lines = _lines(fig, "mean:")
    rows, columns = curve_rows(rs)
    metrics = columns[3:]
    assert set(metrics) == {"val_accuracy", "train_divergence", "val_divergence"}
    # an independent reading: pandas group-by over the ok runs' curves
    runs = rs.runs.to_pandas()
    curves = rs.curves.to_pandas()
    curves = curves[curves.run_id.isin(runs.run_id[runs.status == "ok"])]
    by_pandas = curves.astype({m: "float64" for m in metrics}).groupby(["variant_label", "epoch"])[metrics].mean()
    labels = sorted(set(runs.variant_label))
    assert len(lines) == len(labels) * len(metrics)
    for label, m in itertools.product(labels, metrics):
        x, y = lines[f"mean:{m}:{label}"].get_data()
        mine = [r for r in rows if r["variant"] == label]
        assert list(x) == [r["epoch"] for r in mine]
        np.testing.assert_array_equal(y, [r[m] for r in mine])
        np.testing.assert_allclose(y, by_pandas.loc[label][m].to_numpy(), rtol=1e-12)


def test_curve_band_is_one_sample_sd_across_seeds(sets):
    rs = sets["grid"]
    fig = P.plot_curves(rs, ["val_accuracy"])
    [ax] = fig.axes
    curves = rs.curves.to_pandas()
    label = sorted(set(curves.variant_label))[0]
    last = curves[(curves.variant_label == label) & (curves.epoch == 3)].val_accuracy.to_numpy(dtype=float)
    mean, sd = last.mean(), last.std(ddof=1)  # sample sd, ddof = 1 (common practice)
    colour = _lines(fig, f"mean:val_accuracy:{label}")[f"mean:val_accuracy:{label}"].get_color()
    bands = [c for c in ax.collections if np.allclose(c.get_facecolor()[0][:3], matplotlib_rgb(colour))]
    [band] = bands
    v = band.get_paths()[0].vertices
    ys = v[np.isclose(v[:, 0], 3.0), 1]
    assert ys.max() == pytest.approx(mean + sd, rel=1e-9)
    assert ys.min() == pytest.approx(mean - sd, rel=1e-9)


def matplotlib_rgb(colour):
    from matplotlib.colors import to_rgb
    return to_rgb(colour)


def test_arm_points_are_the_summary_means_and_intervals_match_scipy(sets):
    rs = sets["grid"]
    fig = P.plot_arms(rs)
    arms, seeds = _lines(fig, "arm:"), _lines(fig, "seeds:")
    rows = summary_rows(rs)
    runs = rs.runs.to_pandas()
    assert len(arms) == len(rows) == 4
    [ax] = fig.axes
    intervals = {round(l.get_ydata()[0], 9): l.get_xdata() for l in ax.get_lines() if l.get_gid() is None
                 and len(l.get_xdata()) == 2}
    for r in rows:
        x, y = arms[f"arm:val_accuracy:{r['variant']}"].get_data()
        assert x[0] == r["mean"]
        values = runs[runs.variant_label == r["variant"]].final_val_accuracy.to_numpy(dtype=float)
        # n = 3 seeds are three dots
        np.testing.assert_array_equal(np.sort(seeds[f"seeds:val_accuracy:{r['variant']}"].get_xdata()), np.sort(values))
        # Student t interval of the mean, scipy.stats.t.interval with the standard error
        # (every seed scoring the same makes it the point; scipy returns NaN for a zero scale)
        sem = sps.sem(values)
        lo, hi = (values.mean(),) * 2 if sem == 0 else sps.t.interval(0.95, len(values) - 1, loc=values.mean(), scale=sem)
        np.testing.assert_allclose(intervals[round(y[0], 9)], [lo, hi], rtol=1e-9)


def test_arms_are_sorted_best_first_in_the_metric_direction(sets):
    for name, better in (("grid", max), ("regression", min)):
        rs = sets[name]
        fig = P.plot_arms(rs)
        arms = _lines(fig, "arm:")
        top = max(arms.values(), key=lambda l: l.get_ydata()[0])
        means = [l.get_xdata()[0] for l in arms.values()]
        assert top.get_xdata()[0] == better(means)


def test_grid_cells_hold_the_summary_means_on_the_axis_values(sets):
    rs = sets["grid"]
    fig = P.plot_grid(rs)
    ax = fig.axes[0]
    assert ax.get_ylabel() == "optimizer.learning_rate" and ax.get_xlabel() == "regularization.weight_decay"
    assert [t.get_text() for t in ax.get_yticklabels()] == ["0.03", "0.3"]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["0.0", "0.01"]   # as the labels write it
    means = {r["variant"]: r["mean"] for r in summary_rows(rs)}
    for lr, wd in itertools.product(["0.03", "0.3"], ["0.0", "0.01"]):
        label = f"{lr} · {wd}"
        [text] = [t for t in ax.texts if t.get_gid() == f"cell:val_accuracy:{label}"]
        assert text.get_text().startswith(f"{means[label]:.3g}")


def test_grid_colour_is_the_gap_to_the_best_in_interval_half_widths_on_a_fixed_scale(sets):
    rs = sets["grid"]
    fig = P.plot_grid(rs)
    ax = fig.axes[0]
    image = ax.get_images()[0]
    # a fixed scale, not the observed range: equal gaps get equal colours in every study
    assert image.norm.vmin == 0.0 and image.norm.vmax == P.GAP_SCALE
    grid = np.ma.filled(image.get_array(), np.nan)
    runs = rs.runs.to_pandas()
    by = {label: g.sort_values("seed").final_val_accuracy.to_numpy(dtype=float)
          for label, g in runs.groupby("variant_label")}
    best = max(by, key=lambda label: by[label].mean())
    assert [p.get_gid() for p in ax.patches if (p.get_gid() or "").startswith("best:")] == [f"best:val_accuracy:{best}"]
    for i, lr in enumerate(["0.03", "0.3"]):
        for j, wd in enumerate(["0.0", "0.01"]):
            label = f"{lr} · {wd}"
            d = by[label] - by[best]
            if label == best:
                assert grid[i, j] == 0.0
                continue
            if np.all(d == d[0]):
                continue  # no spread: the interval is decided, not estimated (runtime.stats)
            ci = sps.ttest_rel(by[label], by[best]).confidence_interval(0.95)  # paired t, scipy
            assert grid[i, j] == pytest.approx(abs(d.mean()) / ((ci.high - ci.low) / 2), rel=1e-9)
            [text] = [t for t in ax.texts if t.get_gid() == f"cell:val_accuracy:{label}"]
            # cells whose interval holds 0 cannot be told from the best (Holm only widens that)
            if ci.low <= 0 <= ci.high:
                assert text.get_text().endswith("≈ best")
                assert any(p.get_gid() == f"tied:val_accuracy:{label}" for p in ax.patches)


def test_diff_intervals_match_a_paired_t_interval_by_scipy(sets):
    a, b = sets["grid"], sets["grid_b"]
    fig = P.plot_diff(a, b)
    diffs = _lines(fig, "diff:")
    assert len(diffs) == 4
    ra, rb = a.runs.to_pandas(), b.runs.to_pandas()
    [ax] = fig.axes
    intervals = {round(l.get_ydata()[0], 9): l.get_xdata() for l in ax.get_lines()
                 if l.get_gid() is None and len(l.get_xdata()) == 2}
    # the interval the verdict uses: Holm over the four rows (statsmodels' multipletests), drawn at
    # α / (m − r), the level of the step where Holm stops (runtime.stats.family_alpha)
    from statsmodels.stats.multitest import multipletests
    labels = [gid.split(":", 2)[2] for gid in diffs]
    pairs = {lab: (ra[ra.variant_label == lab].sort_values("seed").final_val_accuracy.to_numpy(dtype=float),
                   rb[rb.variant_label == lab].sort_values("seed").final_val_accuracy.to_numpy(dtype=float))
             for lab in labels}
    raw = [1.0 if np.all(xb == xa) else sps.ttest_rel(xb, xa).pvalue for xa, xb in pairs.values()]
    rejected = int(multipletests(raw, alpha=0.05, method="holm")[0].sum())
    level = 1 - 0.05 / max(len(raw) - rejected, 1)
    for gid, line in diffs.items():
        label = gid.split(":", 2)[2]
        xa = ra[ra.variant_label == label].sort_values("seed").final_val_accuracy.to_numpy(dtype=float)
        xb = rb[rb.variant_label == label].sort_values("seed").final_val_accuracy.to_numpy(dtype=float)
        assert line.get_xdata()[0] == pytest.approx((xb - xa).mean(), rel=1e-9, abs=1e-12)
        y = round(line.get_ydata()[0], 9)
        if np.all(xb - xa == (xb - xa)[0]):
            continue  # no spread: the interval is decided, not estimated (runtime.stats)
        ci = sps.ttest_rel(xb, xa).confidence_interval(level)  # paired t over common seeds
        np.testing.assert_allclose(intervals[y], [ci.low, ci.high], rtol=1e-9)
    assert "data.noise: 0.5 → 1.5" in _subtitle(fig)


# ── what each picture says it shows ──────────────────────────────────────────────────────────────
def test_non_finite_runs_are_marked_at_their_epoch_and_said(sets):
    rs = sets["non_finite"]
    runs = rs.runs.to_pandas()
    bad = runs[runs.status == "non_finite"]
    assert len(bad) == 6
    fig = P.plot_curves(rs)
    assert "6 of 12 runs non-finite" in _subtitle(fig) and "left out of the means" in _subtitle(fig)
    marks = _lines(fig, "non_finite:")
    for label, stops in bad.groupby("variant_label").non_finite_epoch:
        epochs = sorted({int(x) for g, l in marks.items() if g.startswith(f"non_finite:{label}:") for x in l.get_xdata()})
        assert epochs == sorted(set(stops.astype(int)))
        # a variant whose runs all diverged draws no mean line
        assert not any(label in g for g in _lines(fig, "mean:"))
    assert len(_lines(fig, "mean:")) == 2 * 3  # the two ok variants, three metrics each
    arms = P.plot_arms(rs)
    ticks = [t.get_text() for t in arms.axes[0].get_yticklabels()]
    assert sum("all 3 non-finite" in t for t in ticks) == 2
    assert "6 of 12 runs non-finite" in _subtitle(arms)


def test_grid_cells_without_an_interval_are_grey_and_say_untested(sets):
    # one seed per cell: lesion diff has no test (runtime.stats), so no gap can be measured
    fig = P.plot_grid(sets["single_grid"])
    ax = fig.axes[0]
    grid = np.ma.filled(ax.get_images()[0].get_array(), np.nan)
    assert np.sum(grid == 0.0) == 1 and np.isnan(grid).sum() == 3  # the best, and three unknown
    texts = [t.get_text() for t in ax.texts if (t.get_gid() or "").startswith("cell:")]
    assert sum(t.endswith("untested") for t in texts) == 3


def test_curves_of_a_large_grid_are_small_multiples_one_panel_per_level(sets):
    rs = sets["nine"]
    fig = P.plot_curves(rs)
    runs = rs.runs.to_pandas()
    assert runs.variant_label.nunique() == 9 > P.FACET_OVER
    # two metric families (accuracy; train and val divergence) × three learning rates
    assert len(fig.axes) == 2 * 3
    top = [ax for ax in fig.axes if ax.get_title()]
    assert [ax.get_title() for ax in top] == ["learning_rate = 0.03", "learning_rate = 0.1", "learning_rate = 0.3"]
    colour_of_decay = {}
    for ax in fig.axes:
        means = [l for l in ax.get_lines() if (l.get_gid() or "").startswith("mean:")]
        labels = {l.get_gid().split(":", 2)[2] for l in means}
        assert len(labels) == 3  # one line per weight decay, not all nine
        assert len({lab.split(" · ")[0] for lab in labels}) == 1  # a single learning rate per panel
        for line in means:
            decay = line.get_gid().split(" · ")[1]   # the label: learning rate · weight decay
            # the same level of the other axis keeps its colour in every panel
            assert colour_of_decay.setdefault(decay, line.get_color()) == line.get_color()
    assert len(set(colour_of_decay.values())) == 3
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert legend == ["weight_decay=0.0", "weight_decay=0.001", "weight_decay=0.01"]


def test_every_picture_of_grid_labels_says_which_axis_each_part_is(sets):
    # a cell's label is its values alone ("0.03 · 0.0"): the picture names the axes in label order
    key = "labels: learning_rate · weight_decay"
    assert P.label_key(sets["grid"]) == "learning_rate · weight_decay"
    assert P.plot_arms(sets["grid"]).axes[0].get_ylabel() == key
    assert P.plot_diff(sets["grid"], sets["grid_b"]).axes[0].get_ylabel() == key
    curves = P.plot_curves(sets["grid"])            # 4 variants: one panel, labels in the legend
    assert curves.legends[0].get_title().get_text().splitlines()[0] == key
    # (grid titles its axes by their keys: test_grid_cells_hold_the_summary_means_on_the_axis_values)
    # small multiples name the axis in each panel and legend entry instead
    nine = P.plot_curves(sets["nine"])
    assert not nine.legends[0].get_title().get_text().startswith("labels:")


def test_one_seed_says_so_and_draws_no_spread(sets):
    rs = sets["single"]
    fig = P.plot_curves(rs)
    assert "one seed per variant" in _subtitle(fig)
    assert all(len(ax.collections) == 0 for ax in fig.axes)  # no bands
    arms = P.plot_arms(rs)
    assert "no interval" in _subtitle(arms)
    assert len(_lines(arms, "seeds:")) == 2 and all(len(l.get_xdata()) == 1 for l in _lines(arms, "seeds:").values())


def test_regression_study_marks_its_base_and_direction(sets):
    rs = sets["regression"]
    fig = P.plot_arms(rs)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "final val_rmse (lower is better)"
    assert "slag-depth" in _subtitle(fig) and rs.study_hash[:12] in _subtitle(fig)
    ticks = [t.get_text() for t in ax.get_yticklabels()]
    assert "base\n(baseline)" in ticks
    base_mean = next(r["mean"] for r in summary_rows(rs) if r["variant"] == "base")
    assert any(l.get_xdata()[0] == base_mean and l.get_linestyle() == ":" for l in ax.get_lines())
    curves = P.plot_curves(rs)
    assert [a.get_title() for a in curves.axes] == ["val_rmse (solid)",
                                                    "train_divergence (dashed) and val_divergence (solid)"]


def test_grid_of_a_study_that_is_not_a_two_axis_grid_is_an_error(sets):
    with pytest.raises(P.PlotError, match="grid study over exactly two axes.*one_at_a_time"):
        P.plot_grid(sets["regression"])
    with pytest.raises(P.PlotError, match="with 1 axis"):
        P.plot_grid(sets["single"])


# ── layout a reviewer would not wince at ─────────────────────────────────────────────────────────
def _overlap(a, b) -> bool:
    return a.x0 < b.x1 and b.x0 < a.x1 and a.y0 < b.y1 and b.y0 < a.y1


@pytest.mark.parametrize("name,kind", [("grid", "curves"), ("grid", "arms"), ("grid", "grid"),
                                       ("non_finite", "curves"), ("regression", "arms"), ("grid", "diff"),
                                       ("nine", "curves")])
def test_text_stays_on_the_canvas_and_legends_stay_off_the_axes(sets, name, kind, tmp_path):
    fig = P.plot_diff(sets["grid"], sets["grid_b"]) if kind == "diff" else P.plot(sets[name], kind)
    FigureCanvasAgg(fig).draw()  # lays the figure out as saving does
    renderer = fig.canvas.get_renderer()
    # everything drawn (titles, tick labels, notes beside the axes, legends) lies on the canvas
    drawn = fig.get_tightbbox(renderer)  # in inches
    w, h = fig.get_size_inches()
    assert drawn.x0 >= -0.01 and drawn.y0 >= -0.01 and drawn.x1 <= w + 0.01 and drawn.y1 <= h + 0.01, drawn
    for legend in fig.legends:
        for ax in fig.axes:
            assert not _overlap(legend.get_window_extent(renderer), ax.get_window_extent(renderer))
    title = fig._suptitle.get_window_extent(renderer)
    for ax in fig.axes:
        assert not _overlap(title, ax.get_window_extent(renderer))


def test_labels_drop_what_every_key_shares():
    from compiler.labels import axis_names, short_key

    # our own convention: the shortest unique suffix, a component's kind shown as the component
    keys = ["normalization.kind", "regularization.dropout.rate", "optimizer.learning_rate",
            "regularization.weight_decay"]
    assert [short_key(k, keys) for k in keys] == ["normalization", "dropout.rate", "learning_rate", "weight_decay"]
    assert short_key("optimizer.momentum", ["optimizer.momentum", "normalization.momentum"]) == "optimizer.momentum"
    # a name the spec gives an axis wins
    assert axis_names([("optimizer.learning_rate", "lr"), ("normalization.kind", None)]) == {
        "optimizer.learning_rate": "lr", "normalization.kind": "normalization"}


# ── colours ──────────────────────────────────────────────────────────────────────────────────────
# Machado, Oliveira & Fernandes 2009, "A physiologically-based model for simulation of color vision
# deficiency", severity 1.0 matrices on linear RGB (values from memory; each row sums to 1).
_DICHROMACY = {
    "protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
    "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]],
    "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
}


def _lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB (IEC 61966-2-1) → CIELAB under D65 (CIE 15:2004)."""
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], -1)


def _srgb(lin: np.ndarray) -> np.ndarray:
    lin = np.clip(lin, 0, 1)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)


def test_palette_stays_distinguishable_under_simulated_dichromacy():
    rgb = np.array([[int(c[i:i + 2], 16) / 255 for i in (1, 3, 5)] for c in P.PALETTE])
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    assert len(set(P.PALETTE)) == 10
    for name, matrix in [("normal", np.eye(3)), *_DICHROMACY.items()]:
        lab = _lab(_srgb(lin @ np.array(matrix).T))
        worst = min(np.linalg.norm(lab[i] - lab[j]) for i, j in itertools.combinations(range(len(lab)), 2))
        assert worst >= 20, (name, worst)  # CIE76 ΔE; ~2.3 is a just-noticeable difference (Sharma 2003)
    # lines must stand out on white: no colour lighter than L* 75
    assert _lab(rgb)[:, 0].max() < 75


def test_sequential_map_gets_darker_monotonically():
    rgb = P.SEQUENTIAL(np.linspace(0, 1, 64))[:, :3]
    lightness = _lab(rgb)[:, 0]
    assert np.all(np.diff(lightness) < 0)


# ── the command ──────────────────────────────────────────────────────────────────────────────────
def test_cli_writes_the_default_path_and_prints_it(sets):
    rs = sets["grid"]
    out = CliRunner().invoke(app, ["plot", str(rs.path), "--kind", "arms"])
    assert out.exit_code == 0, out.output
    assert out.stdout.strip() == str(rs.path / "plots" / "arms.png")
    assert _png_size(rs.path / "plots" / "arms.png")[0] > 0


def test_cli_against_writes_the_diff(sets, tmp_path):
    target = tmp_path / "d.svg"
    out = CliRunner().invoke(app, ["plot", str(sets["grid"].path), "--against", str(sets["grid_b"].path),
                                   "-o", str(target)])
    assert out.exit_code == 0, out.output
    assert out.stdout.strip() == str(target) and _svg_size(target)[0] > 0


def test_against_with_a_margin_draws_it_and_colours_equivalent_rows(sets):
    # a margin wider than any accuracy difference: every tested row is equivalent, and the two
    # dotted lines stand at ±margin
    fig = P.plot_diff(sets["grid"], sets["grid_b"], margin=0.9)
    [ax] = fig.axes
    dotted = sorted(l.get_xdata()[0] for l in ax.get_lines() if l.get_linestyle() == ":")
    assert dotted == [-0.9, 0.9]
    diamonds = [l for l in ax.get_lines() if (l.get_gid() or "").startswith("diff:")]
    assert diamonds and {l.get_color() for l in diamonds} == {P.VERDICT_COLOURS["equivalent"]}
    bad = CliRunner().invoke(app, ["plot", str(sets["grid"].path), "--margin", "0.1"])
    assert bad.exit_code == 2 and "--against" in bad.stderr


@pytest.mark.parametrize("args,message", [
    (["--kind", "grid"], "grid study over exactly two axes"),
    (["--metric", "val_accuracy"], "has no curves"),  # a classification metric in a regression study
    (["-o", "x.pdf"], ".png or .svg"),
])
def test_cli_bad_input_is_one_line_and_exit_2(sets, args, message):
    out = CliRunner().invoke(app, ["plot", str(sets["regression"].path), *args])
    assert out.exit_code == 2, out.output
    assert message in out.stderr and len(out.stderr.strip().splitlines()) == 1
    assert "Traceback" not in out.output


def test_cli_baseline_is_named_as_diff_names_it(sets, tmp_path):
    path = str(sets["regression"].path)
    # an unknown one: the choices one per line (labels may contain ", " themselves)
    out = CliRunner().invoke(app, ["plot", path, "--kind", "arms", "--baseline", "nope"])
    assert out.exit_code == 2 and "Traceback" not in out.output
    assert out.stderr.splitlines() == ["--baseline 'nope': no such variant; give a label, an index or 'base':",
                                       "  0  base", "  1  weight_decay 0.001", "  2  weight_decay 0.1"]
    # a short label or an index marks the same arm as its full label
    for given in ("weight_decay 0.1", "0.1", "2"):
        out = CliRunner().invoke(app, ["plot", path, "--kind", "arms", "--baseline", given, "-o", str(tmp_path / "a.svg")])
        assert out.exit_code == 0, out.output
        assert "baseline mean (weight_decay 0.1)" in (tmp_path / "a.svg").read_text()


def test_readme_does_not_brand_the_palette():
    # our own rule: the palette is described by what it does, not in a vendor's "<brand> ten" style
    readme = (Path(__file__).parents[2] / "README.md").read_text()
    assert "lesion ten" not in readme

@pytest.mark.parametrize("target", ["/sys/lesion-plot.png", "/sys/lesion-plots/arms.png"])
def test_cli_an_unwritable_picture_path_is_one_line_and_exit_2(sets, target):
    # /sys refuses new files (EACCES) and folders (EPERM) even to root, where a read-only chmod would not
    out = CliRunner().invoke(app, ["plot", str(sets["single"].path), "--kind", "arms", "-o", target])
    assert out.exit_code == 2, out.exception
    (line,) = out.stderr.splitlines()
    assert line.startswith(target) and "cannot write the picture" in line, line
