"""``lesion plot``: pictures of a result set — learning curves, arm comparisons, grid heat maps, diffs.

Contract: every ``plot_*`` function takes opened result sets and returns a matplotlib
:class:`~matplotlib.figure.Figure` (no pyplot, so nothing global is left open); :func:`save_figure`
writes it as PNG or SVG at exactly ``figsize × DPI`` pixels (constrained layout, legends placed
outside the axes by the layout, never ``bbox_inches="tight"``). The numbers drawn come from the
modules that print them — :func:`runtime.show.curve_rows` and :func:`runtime.show.summary_rows`
for means, :func:`runtime.stats.summarize` for spreads and intervals, and
:func:`runtime.diff.diff_result_sets` for differences — so a picture never disagrees with
``lesion show`` or ``lesion diff``. Each plotted mean carries a ``gid`` (``mean:<metric>:<variant>``,
``arm:<metric>:<variant>``, ``seeds:<metric>:<variant>``, ``cell:<metric>:<variant>``,
``diff:<metric>:<variant>``) so that its data can be read back from the figure.

What is drawn:

- ``curves``: per epoch, the mean over a variant's ok runs, and a band of ±1 sample standard
  deviation (ddof = 1) across those runs; train metrics dashed, validation metrics solid, one
  colour and marker per variant; a log axis when a panel's values span more than
  :data:`LOG_SPAN` (ratio of largest to smallest); each diverged run as a × at the top of the
  panel at its ``diverged_at`` epoch (its values there are unbounded, so they are not drawn).
- ``arms``: per variant the final-epoch mean and its 95 % Student t interval
  (``mean ± t_{n-1,0.975} · s/√n``), every ok seed as a dot, best first in the metric's
  direction, the baseline's mean as a vertical line.
- ``grid``: for a two-axis grid study, the final-epoch mean per cell, darker = better.
- ``diff``: per matched variant B − A with its 95 % interval, coloured by the verdict.

Colours: :data:`PALETTE` ("lesion ten"), ten colours chosen for this project so that every pair
stays at least 20 CIELAB ΔE apart under simulated protanopia, deuteranopia and tritanopia;
lines also differ by marker, so colour is never the only cue.
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Rectangle  # noqa: E402
from matplotlib.transforms import blended_transform_factory  # noqa: E402

from compiler.expand import format_value  # noqa: E402
from compiler.spec import METRICS  # noqa: E402
from runtime.show import curve_rows, summary_rows  # noqa: E402
from runtime.stats import summarize  # noqa: E402
from runtime.store import ResultSet  # noqa: E402

__all__ = ["PlotError", "PALETTE", "PALETTE_NAME", "SEQUENTIAL", "KINDS", "DPI", "LOG_SPAN",
           "plot", "plot_curves", "plot_arms", "plot_grid", "plot_diff", "save_figure", "default_path",
           "short_labels"]

PALETTE_NAME = "lesion ten"
PALETTE = ("#0c5886", "#c7680f", "#33948d", "#ce2c66", "#8dbb5a",
           "#7235ba", "#8c5a2b", "#54c0fd", "#eda217", "#454735")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
# Cream to deep blue, CIELAB lightness falling monotonically: a cell's darkness reads as its rank.
SEQUENTIAL = LinearSegmentedColormap.from_list(
    "lesion-depth", ["#f5f2e7", "#b9dcc9", "#5fa8a3", "#2f7797", "#0c4a78", "#10233f"])
VERDICT_COLOURS = {"better": PALETTE[2], "worse": PALETTE[3], "no detectable change": PALETTE[9],
                   "no test possible": "#9a9a9a"}
KINDS = ("curves", "arms", "grid")
DPI = 150
LOG_SPAN = 30.0
_LABEL_WIDTH = 28
# Leaf names that say nothing without their section (``rate`` of what?).
_GENERIC_LEAVES = {"kind", "rate", "delta", "momentum", "epsilon", "fraction", "value", "values", "size",
                   "neurons", "depth"}


class PlotError(ValueError):
    """A plot that cannot be drawn from this input, with a message a person can act on."""


# ── labels and titles ───────────────────────────────────────────────────────────────────────────
def _short_key(key: str, keys: list[str]) -> str:
    """The shortest dotted suffix of ``key`` that is unique among ``keys`` and says what it is:
    ``normalization.kind`` → ``normalization``, ``regularization.dropout.rate`` → ``dropout.rate``."""
    parts = key.split(".")
    if len(parts) > 1 and parts[-1] == "kind":
        parts = parts[:-1]
    others = [k for k in keys if k != key]
    for n in range(1, len(parts) + 1):
        suffix = ".".join(parts[-n:])
        if n == 1 and parts[-1] in _GENERIC_LEAVES and len(parts) > 1:
            continue
        if not any(o == suffix or o.endswith("." + suffix) or o.removesuffix(".kind").endswith(suffix)
                   for o in others):
            return suffix
    return key


def short_labels(rs: ResultSet) -> dict[str, str]:
    """Variant label → display label built from its changed keys (shortened, wrapped). A label the
    user wrote (a listed variant) is kept as written."""
    cols = rs.runs.to_pydict()
    changes = {lab: json.loads(ch) for lab, ch in zip(cols["variant_label"], cols["changes"])}
    keys = list(dict.fromkeys(k for ch in changes.values() for k in ch))
    short = {k: _short_key(k, keys) for k in keys}
    out = {}
    for label, ch in changes.items():
        derived = ", ".join(f"{k}={format_value(v)}" for k, v in ch.items()) or "base"
        if label != derived:
            out[label] = "\n".join(textwrap.wrap(label, _LABEL_WIDTH)) or label
            continue
        parts = [f"{short[k]}={format_value(v)}" for k, v in ch.items()] or ["base"]
        text = ", ".join(parts)
        out[label] = text if len(text) <= _LABEL_WIDTH else "\n".join(parts)
    return out


def _variants(rs: ResultSet) -> list[str]:
    pairs = sorted(set(zip(rs.runs.column("variant_index").to_pylist(), rs.runs.column("variant_label").to_pylist())))
    return [label for _, label in pairs]


def _title(rs: ResultSet, what: str) -> str:
    return f"{rs.tree['study']['name']} ({rs.study_hash[:12]}) — {what}"


def _direction_text(metric: str) -> str:
    d = METRICS.get(metric)
    return "higher is better" if d == "max" else "lower is better" if d == "min" else "no preferred direction"


def _suptitle(fig: Figure, title: str, subtitle: str) -> None:
    # About 11 characters of 11-point text per inch: wrap so that no line is cut at the edges.
    width = max(40, int(fig.get_figwidth() * 11))
    lines = [w for part in [title, *subtitle.split("\n")] for w in textwrap.wrap(part, width)]
    fig.suptitle("\n".join(lines), fontsize=11, linespacing=1.5)


def _figure(width: float, height: float) -> Figure:
    """A constrained-layout figure whose size is a whole number of pixels at :data:`DPI`."""
    return Figure(figsize=(round(width * DPI) / DPI, round(height * DPI) / DPI), layout="constrained", dpi=DPI)


def _runs_by_variant(rs: ResultSet) -> dict[str, list[dict]]:
    cols = rs.runs.to_pydict()
    out: dict[str, list[dict]] = {}
    for i, label in enumerate(cols["variant_label"]):
        out.setdefault(label, []).append({k: v[i] for k, v in cols.items()})
    return out


def _diverged_text(runs: dict[str, list[dict]]) -> str:
    total = sum(len(r) for r in runs.values())
    bad = sum(1 for rr in runs.values() for r in rr if r["status"] != "ok")
    return f"{bad} of {total} runs diverged" if bad else f"all {total} runs finished"


def _seed_counts(runs: dict[str, list[dict]]) -> str:
    counts = [sum(r["status"] == "ok" for r in rr) for rr in runs.values()]
    ok = sorted(set(counts) - {0})
    none = counts.count(0)
    if not ok:
        return "no variant has an ok run"
    text = ("one seed per variant" if ok == [1] else f"n = {ok[0]} ok seeds per variant" if len(ok) == 1
            else f"n = {ok[0]}–{ok[-1]} ok seeds per variant")
    return text + (f", {none} variant{'s' if none > 1 else ''} without any" if none else "")


def _metrics_of(rs: ResultSet, metrics: list[str] | None) -> list[str]:
    have = [c[len("final_"):] for c in rs.runs.column_names if c.startswith("final_")]
    metrics = list(dict.fromkeys(metrics or [rs.headline]))
    for m in metrics:
        if m not in have:
            raise PlotError(f"--metric {m!r} is not in this result set (it has: {', '.join(sorted(have))})")
    return metrics


def _legend_below(fig: Figure, handles: list, ncols: int, title: str | None = None) -> None:
    # As many columns as fit across the figure: 8.5-point text takes about 0.07 in per character,
    # the handle and gaps about 0.8 in.
    longest = max(len(line) for h in handles for line in h.get_label().split("\n"))
    fit = max(1, int(fig.get_figwidth() // (0.8 + 0.07 * longest)))
    if title:
        title = "\n".join(textwrap.wrap(title, int(fig.get_figwidth() / 0.07)))
    fig.legend(handles=handles, loc="outside lower center", ncols=max(1, min(ncols, fit, len(handles))),
               frameon=False, fontsize=8.5, title=title, title_fontsize=8.5)


# ── curves ──────────────────────────────────────────────────────────────────────────────────────
def _family(metric: str) -> str:
    for prefix in ("train_", "val_"):
        if metric.startswith(prefix):
            return metric[len(prefix):]
    return metric


def _style(metric: str) -> str:
    return "--" if metric.startswith("train_") else "-"


def plot_curves(rs: ResultSet, metrics: list[str] | None = None) -> Figure:
    """Per-epoch mean ± 1 sd over ok seeds of each metric; train dashed, validation solid; one panel
    per metric family (``train_divergence`` and ``val_divergence`` share a panel)."""
    have = [c for c in rs.curves.column_names if c not in ("run_id", "variant_label", "seed", "epoch")]
    for m in metrics or []:
        if m not in have:
            raise PlotError(f"--metric {m!r} has no curves in this result set (it has: {', '.join(have)})")
    rows, columns = curve_rows(rs, metrics or None)
    metrics = columns[3:]  # after variant, epoch, runs
    families = list(dict.fromkeys(_family(m) for m in metrics))
    labels = _variants(rs)
    names = short_labels(rs)
    runs = _runs_by_variant(rs)
    ok_ids = {r["run_id"] for rr in runs.values() for r in rr if r["status"] == "ok"}
    diverged = sum(r["status"] != "ok" for rr in runs.values() for r in rr)
    bad_variants = [label for label in labels if any(r["status"] != "ok" for r in runs[label])]
    curves = rs.curves.to_pydict()
    ok_rows: dict[tuple[str, int], list[int]] = {}
    for i, (label, epoch, rid) in enumerate(zip(curves["variant_label"], curves["epoch"], curves["run_id"])):
        if rid in ok_ids:
            ok_rows.setdefault((label, epoch), []).append(i)

    fig = _figure(max(6.4, 5.4 * len(families)), 4.4 + 0.22 * math.ceil(len(labels) / 3))
    axes = fig.subplots(1, len(families), squeeze=False)[0]
    for ax, fam in zip(axes, families):
        top = blended_transform_factory(ax.transData, ax.transAxes)
        panel = [m for m in metrics if _family(m) == fam]
        values = []
        for vi, label in enumerate(labels):
            colour, marker = PALETTE[vi % len(PALETTE)], MARKERS[vi % len(MARKERS)]
            mine = [r for r in rows if r["variant"] == label]
            for m in panel:
                if mine:
                    x = [r["epoch"] for r in mine]
                    y = [r[m] for r in mine]
                    line, = ax.plot(x, y, _style(m), color=colour, marker=marker, markersize=3.5,
                                    markevery=max(1, len(x) // 8), linewidth=1.6, gid=f"mean:{m}:{label}")
                    values += [v for v in y if math.isfinite(v)]
                    sd = np.array([summarize([curves[m][i] for i in ok_rows[(label, e)]]).sd for e in x])
                    if np.isfinite(sd).any():
                        lo, hi = np.asarray(y) - sd, np.asarray(y) + sd
                        # On a log axis a band below zero would vanish: stop it near the panel's floor.
                        lo = np.maximum(lo, 0.5 * min(v for v in y if v > 0)) if min(y) > 0 else lo
                        ax.fill_between(x, lo, hi, color=colour, alpha=0.15, linewidth=0)
            stops = sorted(r["diverged_at"] for r in runs[label] if r["status"] != "ok" and r["diverged_at"])
            # Just above the data area (diverged values are unbounded and would crush the scale),
            # one row per variant so that runs stopping at the same epoch do not hide each other.
            row = 1.03 + 0.05 * bad_variants.index(label) if stops else 0.0
            for epoch in dict.fromkeys(stops):
                ax.plot([epoch], [row], "x", color=colour, markersize=8, markeredgewidth=2,
                        transform=top, clip_on=False, gid=f"diverged:{label}:{epoch}")
                if stops.count(epoch) > 1:
                    ax.annotate(f"×{stops.count(epoch)}", (epoch, row), xycoords=top, xytext=(6, 0),
                                textcoords="offset points", va="center", fontsize=7.5, color=colour,
                                annotation_clip=False)
        positive = [v for v in values if v > 0]
        log = bool(positive) and len(positive) == len(values) and max(positive) / min(positive) > LOG_SPAN
        if log:
            ax.set_yscale("log")
        ax.set_xlabel("epoch")
        ax.set_ylabel(fam + (" (log scale)" if log else ""))
        styles = " and ".join(f"{m} ({'dashed' if _style(m) == '--' else 'solid'})" for m in panel)
        ax.set_title(styles, fontsize=9.5, pad=6 + 14 * len(bad_variants))
        ax.grid(True, alpha=0.25, linewidth=0.6)
        ax.xaxis.get_major_locator().set_params(integer=True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)

    handles = []
    for vi, label in enumerate(labels):
        ok = sum(r["status"] == "ok" for r in runs[label])
        bad = len(runs[label]) - ok
        tail = f" ({ok} ok, {bad} diverged)" if bad else f" (n={ok})"
        handles.append(Line2D([], [], color=PALETTE[vi % len(PALETTE)], marker=MARKERS[vi % len(MARKERS)],
                              markersize=4, label=names[label].replace("\n", ", ") + tail))
    # The key to styles goes in the legend's title: in a column of its own it would be read as a variant.
    key = []
    if any(m.startswith("train_") for m in metrics) and any(not m.startswith("train_") for m in metrics):
        key.append("dashed = train, solid = validation")
    if _seed_counts(runs) != "one seed per variant":
        key.append("shaded band = ±1 sd across ok seeds")
    if diverged:
        key.append("× = a diverged run, at the epoch it stopped")
    _legend_below(fig, handles, 3, title="   ·   ".join(key) or None)
    one = _seed_counts(runs) == "one seed per variant"
    what = ("lines are single runs (one seed per variant: no spread to show)" if one else
            f"mean over ok seeds with a ±1 sd band; {_seed_counts(runs)}")
    sub = f"{what}; {_diverged_text(runs)}" + ("; diverged runs left out of the means" if diverged else "")
    _suptitle(fig, _title(rs, "learning curves"), sub)
    return fig


# ── arms ────────────────────────────────────────────────────────────────────────────────────────
def _baseline(rs: ResultSet, baseline: str | None, labels: list[str]) -> str | None:
    if baseline is None:
        return "base" if "base" in labels else None
    if baseline not in labels:
        raise PlotError(f"--baseline {baseline!r}: no such variant (labels: {'; '.join(labels)})")
    return baseline


def _order(rows: list[dict], metric: str) -> list[str]:
    """Best first in the metric's direction; variants without an ok run last."""
    sign = 1.0 if METRICS.get(metric, "max") == "max" else -1.0
    return [r["variant"] for r in sorted(rows, key=lambda r: (not math.isfinite(r["mean"]),
                                                             -sign * r["mean"] if math.isfinite(r["mean"]) else 0))]


def _seed_rows(n: int) -> np.ndarray:
    # Seeds on their own strip under the mean, spread evenly (not at random: the same result set
    # gives the same picture), so that equal values stay countable.
    return np.full(1, -0.22) if n == 1 else np.linspace(-0.12, -0.34, n)


def _arm_tick(name: str, row: dict, is_base: bool, single: bool) -> str:
    notes = ["baseline"] if is_base else []
    if row["diverged"]:
        total = row["ok"] + row["diverged"]
        notes.append(f"all {total} diverged" if not row["ok"] else f"{row['diverged']} of {total} diverged")
    if row["ok"] == 1 and not single:  # when every variant has one seed, the subtitle says so once
        notes.append("n=1")
    return name + (f"\n({', '.join(notes)})" if notes else "")


def plot_arms(rs: ResultSet, metrics: list[str] | None = None, baseline: str | None = None) -> Figure:
    """Final-epoch mean and 95 % t interval per variant, seeds as dots; best at the top."""
    metrics = _metrics_of(rs, metrics)
    labels = _variants(rs)
    base = _baseline(rs, baseline, labels)
    names = short_labels(rs)
    runs = _runs_by_variant(rs)
    tables = {m: {r["variant"]: r for r in summary_rows(rs, m)} for m in metrics}
    order = _order(list(tables[metrics[0]].values()), metrics[0])
    height = 1.9 + 0.5 * len(order) + 0.35 * (1 + (base is not None))
    fig = _figure(4.0 + 4.2 * len(metrics), height)
    axes = fig.subplots(1, len(metrics), squeeze=False, sharey=True)[0]
    ys = {label: len(order) - 1 - i for i, label in enumerate(order)}
    for ax, m in zip(axes, metrics):
        table = tables[m]
        for label in order:
            r, y = table[label], ys[label]
            colour = PALETTE[0] if label != base else PALETTE[1]
            seeds = [x[f"final_{m}"] for x in runs[label] if x["status"] == "ok"]
            ax.plot(seeds, y + _seed_rows(len(seeds)), "o", markersize=4.5, markerfacecolor="none",
                    markeredgecolor=colour, alpha=0.7, gid=f"seeds:{m}:{label}")
            if math.isfinite(r["ci_low"]):
                ax.plot([r["ci_low"], r["ci_high"]], [y, y], "-", color=colour, linewidth=2.2, alpha=0.8,
                        solid_capstyle="butt")
            if math.isfinite(r["mean"]):
                ax.plot([r["mean"]], [y], "D", color=colour, markersize=6.5, gid=f"arm:{m}:{label}")
        if base is not None and math.isfinite(table[base]["mean"]):
            ax.axvline(table[base]["mean"], color=PALETTE[1], linestyle=":", linewidth=1.2)
        ax.set_xlabel(f"final {m} ({_direction_text(m)})")
        ax.grid(True, axis="x", alpha=0.25, linewidth=0.6)
        ax.set_ylim(-0.6, len(order) - 0.4)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    single = _seed_counts(runs) == "one seed per variant"
    axes[0].set_yticks([ys[label] for label in order], [_arm_tick(names[label], tables[metrics[0]][label], label == base, single)
                                                         for label in order], fontsize=8.5)
    for tick, label in zip(axes[0].get_yticklabels(), order):
        if label == base:
            tick.set_fontweight("bold")
    handles = [Line2D([], [], color=PALETTE[0], marker="D", linestyle="none", label="mean over ok seeds"),
               Line2D([], [], color=PALETTE[0], linewidth=2.2, label="95 % t interval of the mean"),
               Line2D([], [], color=PALETTE[0], marker="o", markerfacecolor="none", linestyle="none",
                      label="one seed's final value")]
    if single:
        del handles[1]
    if base is not None:
        handles.append(Line2D([], [], color=PALETTE[1], linestyle=":", label=f"baseline mean ({names[base]})"))
    _legend_below(fig, handles, 4)
    head = metrics[0]
    sub = (f"final-epoch {', '.join(metrics)}, sorted best first by {head}; {_seed_counts(runs)}; "
           f"{_diverged_text(runs)}")
    if single:
        sub += "; one seed: no interval (run more seeds)"
    _suptitle(fig, _title(rs, "arms compared"), sub)
    return fig


# ── grid ────────────────────────────────────────────────────────────────────────────────────────
def _grid_axes(rs: ResultSet) -> list[dict]:
    study = rs.tree
    ab = study.get("ablation") or {}
    axes = ab.get("axis") or []
    if ab.get("mode") != "grid" or len(axes) != 2 or ab.get("variant"):
        what = f"mode = {ab.get('mode')!r} with {len(axes)} ax{'i' if len(axes) == 1 else 'e'}s" if ab else "no ablation"
        raise PlotError(f"{rs.path}: --kind grid needs a grid study over exactly two axes; "
                        f"'{study['study']['name']}' has {what} (try --kind arms)")
    return axes


def _cell_text(r: dict) -> str:
    if not math.isfinite(r["mean"]):
        return f"all {r['diverged']}\ndiverged"
    text = f"{r['mean']:.3g}"
    if math.isfinite(r["sd"]):
        text += f"\n±{r['sd']:.2g}"
    if r["diverged"]:
        text += f"\n{r['diverged']} diverged"
    return text


def plot_grid(rs: ResultSet, metrics: list[str] | None = None) -> Figure:
    """Heat map of the final-epoch mean over the two axes of a grid study (darker = better)."""
    ax_y, ax_x = _grid_axes(rs)
    metrics = _metrics_of(rs, metrics)
    runs = _runs_by_variant(rs)
    cell_of = {}
    for label, rr in runs.items():
        ch = json.loads(rr[0]["changes"])
        i = next(i for i, v in enumerate(ax_y["values"]) if v == ch.get(ax_y["key"]))
        j = next(j for j, v in enumerate(ax_x["values"]) if v == ch.get(ax_x["key"]))
        cell_of[label] = (i, j)
    ny, nx = len(ax_y["values"]), len(ax_x["values"])
    fig = _figure(2.2 + (1.25 * nx + 1.6) * len(metrics), 1.9 + 0.85 * ny)
    axes = fig.subplots(1, len(metrics), squeeze=False)[0]
    for ax, m in zip(axes, metrics):
        table = {r["variant"]: r for r in summary_rows(rs, m)}
        grid = np.full((ny, nx), np.nan)
        for label, (i, j) in cell_of.items():
            grid[i, j] = table[label]["mean"]
        cmap = SEQUENTIAL if METRICS.get(m, "max") == "max" else SEQUENTIAL.reversed()
        cmap = cmap.with_extremes(bad="#d9d9d9")
        finite = grid[np.isfinite(grid)]
        lo, hi = (finite.min(), finite.max()) if finite.size else (0.0, 1.0)
        if lo == hi:
            lo, hi = lo - 0.5, hi + 0.5
        image = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, vmin=lo, vmax=hi, aspect="auto", gid=f"grid:{m}")
        for label, (i, j) in cell_of.items():
            v = grid[i, j]
            shade = (v - lo) / (hi - lo) if math.isfinite(v) else 0.0
            dark = shade > 0.55 if cmap.name == SEQUENTIAL.name else shade < 0.45
            ax.text(j, i, _cell_text(table[label]), ha="center", va="center", fontsize=8.5,
                    color="white" if math.isfinite(v) and dark else "black", gid=f"cell:{m}:{label}")
        if finite.size:
            best = np.nanargmax(grid) if METRICS.get(m, "max") == "max" else np.nanargmin(grid)
            bi, bj = np.unravel_index(best, grid.shape)
            ax.add_patch(Rectangle((bj - 0.5, bi - 0.5), 1, 1, fill=False, edgecolor=PALETTE[1], linewidth=2.5))
        ax.set_xticks(range(nx), [format_value(v) for v in ax_x["values"]])
        ax.set_yticks(range(ny), [format_value(v) for v in ax_y["values"]])
        ax.set_xlabel(ax_x["key"])
        ax.set_ylabel(ax_y["key"])
        ax.tick_params(length=0)
        for spine in ax.spines.values():
            spine.set_visible(False)
        bar = fig.colorbar(image, ax=ax, shrink=0.9)
        bar.set_label(f"final {m}\n({_direction_text(m)}; darker = better)", fontsize=8.5)
    _suptitle(fig, _title(rs, f"final {', '.join(metrics)} over {ax_y['key']} × {ax_x['key']}"),
              f"cells: mean ± sd of the final epoch over ok seeds, best outlined; "
              f"{_seed_counts(runs)}; {_diverged_text(runs)}")
    return fig


# ── diff ────────────────────────────────────────────────────────────────────────────────────────
def plot_diff(rs_a: ResultSet, rs_b: ResultSet, metrics: list[str] | None = None,
              correction: str = "holm", alpha: float = 0.05) -> Figure:
    """B − A per matched variant with its 95 % interval, coloured by the verdict of ``lesion diff``."""
    from runtime.diff import diff_result_sets

    report = diff_result_sets(rs_a, rs_b, metrics=metrics, correction=correction, alpha=alpha)
    if not report.rows:
        raise PlotError(f"{rs_a.path} and {rs_b.path}: no variant of one matches a variant of the other; "
                        f"nothing to compare (only in A: {len(report.only_a)}, only in B: {len(report.only_b)})")
    names = {**short_labels(rs_a), **short_labels(rs_b)}
    metrics = list(dict.fromkeys(r["metric"] for r in report.rows))
    pairs = list(dict.fromkeys((r["variant_a"], r["variant_b"]) for r in report.rows))
    fig = _figure(4.6 + 4.4 * len(metrics), 2.3 + 0.5 * len(pairs))
    axes = fig.subplots(1, len(metrics), squeeze=False, sharey=True)[0]
    for ax, m in zip(axes, metrics):
        ax.axvline(0.0, color="black", linewidth=0.8)
        for k, (a, b) in enumerate(pairs):
            y = len(pairs) - 1 - k
            row = next(r for r in report.rows if r["metric"] == m and (r["variant_a"], r["variant_b"]) == (a, b))
            colour = VERDICT_COLOURS[row["verdict"]]
            lo, hi = row["ci_low"], row["ci_high"]
            if lo is not None and math.isfinite(lo):
                ax.plot([lo, hi], [y, y], "-", color=colour, linewidth=2.2, solid_capstyle="butt")
            if row["diff"] is not None and math.isfinite(row["diff"]):
                ax.plot([row["diff"]], [y], "D", color=colour, markersize=6.5, gid=f"diff:{m}:{b}")
            p = row["p_adjusted"]
            note = f"{row['verdict']} ({row['test']}, n={row['n_b']})" if row["test"] != "none" else row["verdict"]
            note += f", p adj {p:.2g}" if p is not None and math.isfinite(p) else ""
            ax.annotate(note, (1.0, y), xycoords=("axes fraction", "data"), xytext=(4, 0),
                        textcoords="offset points", va="center", fontsize=8, color=colour, annotation_clip=False)
        ax.set_xlabel(f"B − A, final {m} ({_direction_text(m)})")
        ax.set_ylim(-0.6, len(pairs) - 0.4)
        ax.grid(True, axis="x", alpha=0.25, linewidth=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    ticks = [names[b] if a == b else f"{names[a]}\n→ {names[b]}" for a, b in pairs]
    axes[0].set_yticks([len(pairs) - 1 - k for k in range(len(pairs))], ticks, fontsize=8.5)
    used = list(dict.fromkeys(r["verdict"] for r in report.rows))
    handles = [Line2D([], [], color=VERDICT_COLOURS[v], marker="D", linewidth=2.2, label=v) for v in used]
    _legend_below(fig, handles, 4, title="B − A and its 95 % interval; verdict at the adjusted level "
                                         f"α = {alpha:g} ({'Holm' if correction == 'holm' else 'Benjamini–Hochberg'})")
    if report.same_study:
        spec = "identical studies (a reproducibility check)"
    else:
        shown = [c.render() for c in report.changes[:2]]
        spec = "spec changes: " + "; ".join(shown) + (f" (+{len(report.changes) - 2} more)" if len(report.changes) > 2 else "")
    if report.only_a or report.only_b:
        spec += f"; unmatched: {len(report.only_a)} only in A, {len(report.only_b)} only in B"
    a_name, b_name = rs_a.tree["study"]["name"], rs_b.tree["study"]["name"]
    title = f"A {a_name} ({rs_a.study_hash[:12]}) → B {b_name} ({rs_b.study_hash[:12]}) — diff"
    _suptitle(fig, title, "\n".join(textwrap.wrap(spec, 110)))
    return fig


# ── dispatch and files ──────────────────────────────────────────────────────────────────────────
def plot(rs: ResultSet, kind: str = "curves", *, metrics: list[str] | None = None,
         baseline: str | None = None) -> Figure:
    if kind == "curves":
        if baseline is not None:
            raise PlotError("--baseline marks an arm; it applies to --kind arms only")
        return plot_curves(rs, metrics)
    if kind == "arms":
        return plot_arms(rs, metrics, baseline)
    if kind == "grid":
        return plot_grid(rs, metrics)
    raise PlotError(f"--kind {kind!r}: expected one of {', '.join(KINDS)}")


def default_path(rs: ResultSet, kind: str) -> Path:
    return rs.path / "plots" / f"{kind}.png"


def save_figure(fig: Figure, path: str | Path) -> Path:
    """Write ``fig`` as PNG or SVG (by the suffix), ``figsize × DPI`` pixels; parent folders made."""
    path = Path(path)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in ("png", "svg"):
        raise PlotError(f"-o {path}: expected a file ending in .png or .svg")
    # No date in the file, fixed SVG ids: the same result set gives the same bytes.
    metadata = {"Date": None} if fmt == "svg" else {}
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with matplotlib.rc_context({"svg.hashsalt": "lesion", "svg.fonttype": "path"}):
            fig.savefig(path, format=fmt, dpi=DPI, metadata=metadata)
    except OSError as err:
        raise PlotError(f"{path}: cannot write the picture ({err.strerror or err}); choose a writable -o") from None
    return path
