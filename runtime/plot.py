"""``lesion plot``: pictures of a result set — learning curves, arm comparisons, grid heat maps, diffs.

Contract: every ``plot_*`` function takes opened result sets and returns a matplotlib
:class:`~matplotlib.figure.Figure` (no pyplot, so nothing global is left open); :func:`save_figure`
writes it as PNG or SVG at exactly ``figsize × DPI`` pixels (constrained layout, legends placed
outside the axes by the layout, never ``bbox_inches="tight"``). The numbers drawn come from the
modules that print them — :func:`runtime.show.curve_rows` and :func:`runtime.show.summary_rows`
for means, :func:`runtime.stats.summarize` for spreads and intervals, and
:func:`runtime.diff.diff_result_sets` and :func:`runtime.diff.diff_baseline` for differences — so a picture never disagrees with
``lesion show`` or ``lesion diff``. Each plotted mean carries a ``gid`` (``mean:<metric>:<variant>``,
``arm:<metric>:<variant>``, ``seeds:<metric>:<variant>``, ``cell:<metric>:<variant>``,
``diff:<metric>:<variant>``; grid outlines ``best:…`` and ``tied:…``) so that its data can be read
back from the figure.

What is drawn:

- ``curves``: per epoch, the mean over a variant's ok runs, and a band of ±1 sample standard
  deviation (ddof = 1) across those runs; train metrics dashed, validation metrics solid, one
  colour and marker per variant; a log axis when a panel's values span more than
  :data:`LOG_SPAN` (ratio of largest to smallest); each non-finite run as a × at the top of the
  panel at its ``non_finite_epoch`` epoch (its values there are unbounded, so they are not drawn). A
  grid of more than :data:`FACET_OVER` variants becomes small multiples (:func:`_facets`): nine
  lines in one panel cannot be followed.
- ``arms``: per variant the final-epoch mean and its 95 % Student t interval
  (``mean ± t_{n-1,0.975} · s/√n``), every ok seed as a dot, best first in the metric's
  direction, the baseline's mean as a vertical line.
- ``grid``: for a two-axis grid study, per cell the final-epoch mean ± sd as text; the colour is
  the cell's gap to the best cell in half-widths of the 95 % interval of their difference (the
  comparison of ``lesion diff --baseline <best>``) on a fixed scale 0 … :data:`GAP_SCALE`, so
  cells within seed noise of the best stay as dark as it; cells with no detectable change from the best
  (adjusted verdict) are outlined dashed. A scale spanning only the observed range would turn
  noise into contrast.
- ``diff``: per matched variant B − A with its 95 % interval, coloured by the verdict.

Colours: :data:`PALETTE`, ten colours chosen for this project so that every pair
stays at least 20 CIELAB ΔE apart under simulated protanopia, deuteranopia and tritanopia;
lines also differ by marker, so colour is never the only cue.
"""

from __future__ import annotations

import io
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
from matplotlib.ticker import FuncFormatter  # noqa: E402
from matplotlib.transforms import blended_transform_factory  # noqa: E402

from compiler.errors import UserError  # noqa: E402
from compiler.labels import SEPARATOR, axis_names, format_value, label_parts  # noqa: E402
from compiler.spec import direction  # noqa: E402
from runtime.show import curve_rows, summary_rows  # noqa: E402
from runtime.stats import summarize  # noqa: E402
from runtime.store import ResultSet  # noqa: E402

__all__ = ["PlotError", "label_key", "PALETTE", "SEQUENTIAL", "KINDS", "DPI", "LOG_SPAN",
           "GAP_SCALE", "FACET_OVER", "plot", "plot_curves", "plot_arms", "plot_grid", "plot_diff", "save_figure", "svg_markup", "default_path",
           "short_labels"]

PALETTE = ("#0c5886", "#c7680f", "#33948d", "#ce2c66", "#8dbb5a",
           "#7235ba", "#8c5a2b", "#54c0fd", "#eda217", "#454735")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
# Cream to deep blue, CIELAB lightness falling monotonically: a cell's darkness reads as its rank.
SEQUENTIAL = LinearSegmentedColormap.from_list(
    "lesion-depth", ["#f5f2e7", "#b9dcc9", "#5fa8a3", "#2f7797", "#0c4a78", "#10233f"])
VERDICT_COLOURS = {"better": PALETTE[2], "worse": PALETTE[3], "equivalent": PALETTE[0],
                   "inconclusive": PALETTE[9], "no detectable change": PALETTE[9], "no test possible": "#9a9a9a"}
KINDS = ("curves", "arms", "grid", "budget")
DPI = 150
LOG_SPAN = 30.0
# curves: a grid with more variants than this is drawn as small multiples (one panel per level).
FACET_OVER = 4
# Grid colour scale: gaps to the best of 0 … GAP_SCALE half-widths of the 95 % interval (beyond: the palest).
GAP_SCALE = 4.0
_LABEL_WIDTH = 28


class PlotError(UserError, ValueError):
    """A plot that cannot be drawn from this input, with a message a person can act on."""


# ── labels and titles ───────────────────────────────────────────────────────────────────────────
def short_labels(rs: ResultSet) -> dict[str, str]:
    """Variant label → display label: the label, wrapped at spaces (generated labels are short
    already: a grid cell's values, an axis's short name and value)."""
    return {label: "\n".join(textwrap.wrap(label, _LABEL_WIDTH)) or label
            for label in dict.fromkeys(rs.runs.column("variant_label").to_pylist())}


def label_key(rs: ResultSet) -> str | None:
    """What each part of a grid cell's label is (``normalization · dropout.rate`` for
    ``none · 0.15``): the axes' short names in label order, as ``lesion check`` names them. None
    where labels say it themselves (one change at a time: ``dropout.rate 0.15``; listed variants)."""
    ab = rs.tree.get("ablation") or {}
    axes = ab.get("axis") or []
    if ab.get("mode") != "grid" or not axes:
        return None
    short = axis_names([(a["key"], a.get("name")) for a in axes])
    return SEPARATOR.join(short[a["key"]] for a in axes)


def _label_title(*sets: ResultSet) -> str | None:
    """The picture's key to its labels, ``labels: normalization · dropout.rate``; of two result
    sets whose labels read differently, each one's."""
    keys = [label_key(rs) for rs in sets]
    if not any(keys):
        return None
    if len(set(keys)) == 1:
        return f"labels: {keys[0]}"
    return "; ".join(f"labels of {side}: {key}" for side, key in zip("AB", keys) if key)


def _one_line(label: str, name: str) -> str:
    """A display name on one line: a label the user wrote comes back as written (it was only
    wrapped at spaces), a derived one's parts are joined by commas."""
    return label if name.replace("\n", " ") == label else name.replace("\n", ", ")


def _variants(rs: ResultSet) -> list[str]:
    pairs = sorted(set(zip(rs.runs.column("variant_index").to_pylist(), rs.runs.column("variant_label").to_pylist())))
    return [label for _, label in pairs]


def _title(rs: ResultSet, what: str) -> str:
    return f"{rs.tree['study']['name']} ({rs.study_hash[:12]}) — {what}"


def _direction_text(metric: str) -> str:
    d = direction(metric)
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


def _non_finite_text(runs: dict[str, list[dict]]) -> str:
    total = sum(len(r) for r in runs.values())
    bad = sum(1 for rr in runs.values() for r in rr if r["status"] != "ok")
    return f"{bad} of {total} runs non-finite" if bad else f"all {total} runs finished"


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
    metrics = list(dict.fromkeys(metrics or [rs.headline]))
    rs.require(metrics)
    return metrics


def _legend_below(fig: Figure, handles: list, ncols: int, title: str | None = None) -> None:
    # As many columns as fit across the figure: 8.5-point text takes about 0.07 in per character,
    # the handle and gaps about 0.8 in.
    longest = max(len(line) for h in handles for line in h.get_label().split("\n"))
    fit = max(1, int(fig.get_figwidth() // (0.8 + 0.07 * longest)))
    if title:
        title = "\n".join(w for line in title.split("\n") for w in textwrap.wrap(line, int(fig.get_figwidth() / 0.07)))
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


def _facets(rs: ResultSet, labels: list[str], names: dict[str, str]):
    """How ``curves`` splits variants into panels: ``[(panel title, [labels])]``, each label's
    colour index and its legend name. A grid over two or more axes with more than
    :data:`FACET_OVER` variants gets one panel per level of its first axis, each variant coloured
    by its levels of the other axes (the same colour means the same levels in every panel);
    otherwise one panel holds every variant."""
    ab = rs.tree.get("ablation") or {}
    axes = ab.get("axis") or []
    if ab.get("mode") != "grid" or len(axes) < 2 or ab.get("variant") or len(labels) <= FACET_OVER:
        return [(None, labels)], {label: i for i, label in enumerate(labels)}, names
    runs = _runs_by_variant(rs)
    changes = {label: json.loads(runs[label][0]["changes"]) for label in labels}
    keys = [a["key"] for a in axes]
    short = axis_names([(a["key"], a.get("name")) for a in axes])
    panels = [(f"{short[keys[0]]} = {format_value(v)}", [label for label in labels if changes[label].get(keys[0]) == v])
              for v in axes[0]["values"]]
    rest = {label: tuple(json.dumps(changes[label].get(k)) for k in keys[1:]) for label in labels}
    levels = list(dict.fromkeys(rest[label] for label in labels))
    legend = {label: ", ".join(label_parts({k: changes[label].get(k) for k in keys[1:]}, short.__getitem__))
              for label in labels}
    return [p for p in panels if p[1]], {label: levels.index(rest[label]) for label in labels}, legend


def plot_curves(rs: ResultSet, metrics: list[str] | None = None) -> Figure:
    """Per-epoch mean ± 1 sd over ok seeds of each metric; train dashed, validation solid; one row
    of panels per metric family (``train_divergence`` and ``val_divergence`` share one), one
    column per level of a grid's first axis when there are many variants (:func:`_facets`)."""
    rs.require(metrics or [], curves=True)
    rows, columns = curve_rows(rs, metrics or None)
    metrics = columns[3:]  # after variant, epoch, runs
    families = list(dict.fromkeys(_family(m) for m in metrics))
    labels = _variants(rs)
    names = short_labels(rs)
    panels, colour_of, legend_names = _facets(rs, labels, names)
    faceted = len(panels) > 1
    runs = _runs_by_variant(rs)
    ok_ids = {r["run_id"] for rr in runs.values() for r in rr if r["status"] == "ok"}
    non_finite = sum(r["status"] != "ok" for rr in runs.values() for r in rr)
    curves = rs.curves.to_pydict()
    ok_rows: dict[tuple[str, int], list[int]] = {}
    for i, (label, epoch, rid) in enumerate(zip(curves["variant_label"], curves["epoch"], curves["run_id"])):
        if rid in ok_ids:
            ok_rows.setdefault((label, epoch), []).append(i)

    legend_rows = math.ceil(len(set(colour_of.values())) / 3)
    if faceted:
        fig = _figure(max(6.4, 1.3 + 3.7 * len(panels)), 1.9 + 2.9 * len(families) + 0.22 * legend_rows)
        grid = fig.subplots(len(families), len(panels), squeeze=False, sharex=True, sharey="row")
    else:
        fig = _figure(max(6.4, 5.4 * len(families)), 4.4 + 0.22 * legend_rows)
        grid = fig.subplots(1, len(families), squeeze=False).T
    for r, fam in enumerate(families):
        panel_metrics = [m for m in metrics if _family(m) == fam]
        values = []
        for c, (title, members) in enumerate(panels):
            ax = grid[r, c]
            top = blended_transform_factory(ax.transData, ax.transAxes)
            bad_variants = [label for label in members if any(x["status"] != "ok" for x in runs[label])]
            for label in members:
                colour, marker = PALETTE[colour_of[label] % len(PALETTE)], MARKERS[colour_of[label] % len(MARKERS)]
                mine = [x for x in rows if x["variant"] == label]
                for m in panel_metrics:
                    if mine:
                        x = [e["epoch"] for e in mine]
                        y = [e[m] for e in mine]
                        ax.plot(x, y, _style(m), color=colour, marker=marker, markersize=3.5,
                                markevery=max(1, len(x) // 8), linewidth=1.6, gid=f"mean:{m}:{label}")
                        values += [v for v in y if math.isfinite(v)]
                        sd = np.array([summarize([curves[m][i] for i in ok_rows[(label, e)]]).sd for e in x])
                        if np.isfinite(sd).any():
                            lo, hi = np.asarray(y) - sd, np.asarray(y) + sd
                            # On a log axis a band below zero would vanish: stop it near the panel's floor.
                            lo = np.maximum(lo, 0.5 * min(v for v in y if v > 0)) if min(y) > 0 else lo
                            ax.fill_between(x, lo, hi, color=colour, alpha=0.15, linewidth=0)
                stops = sorted(x["non_finite_epoch"] for x in runs[label] if x["status"] != "ok" and x["non_finite_epoch"])
                # Just above the data area (non-finite values are unbounded and would crush the scale),
                # one row per variant so that runs stopping at the same epoch do not hide each other.
                row = 1.03 + 0.05 * bad_variants.index(label) if stops else 0.0
                for epoch in dict.fromkeys(stops):
                    ax.plot([epoch], [row], "x", color=colour, markersize=8, markeredgewidth=2,
                            transform=top, clip_on=False, gid=f"non_finite:{label}:{epoch}")
                    if stops.count(epoch) > 1:
                        ax.annotate(f"×{stops.count(epoch)}", (epoch, row), xycoords=top, xytext=(6, 0),
                                    textcoords="offset points", va="center", fontsize=7.5, color=colour,
                                    annotation_clip=False)
            styles = " and ".join(f"{m} ({'dashed' if _style(m) == '--' else 'solid'})" for m in panel_metrics)
            if faceted:
                ax.set_title(title if r == 0 else "", fontsize=9.5, pad=6 + 14 * len(bad_variants))
            else:
                ax.set_title(styles, fontsize=9.5, pad=6 + 14 * len(bad_variants))
            ax.grid(True, alpha=0.25, linewidth=0.6)
            ax.xaxis.get_major_locator().set_params(integer=True)
            if r == len(families) - 1 or not faceted:
                ax.set_xlabel("epoch")
            for side in ("top", "right"):
                ax.spines[side].set_visible(False)
        positive = [v for v in values if v > 0]
        log = bool(positive) and len(positive) == len(values) and max(positive) / min(positive) > LOG_SPAN
        for ax in grid[r]:
            if log:
                ax.set_yscale("log")
        grid[r, 0].set_ylabel(fam + (" (log scale)" if log else ""))

    handles, seen = [], set()
    for label in labels:
        if colour_of[label] in seen:
            continue
        seen.add(colour_of[label])
        same = [x for lab in labels if colour_of[lab] == colour_of[label] for x in runs[lab]]
        ok = sum(x["status"] == "ok" for x in same)
        bad = len(same) - ok
        tail = f" ({ok} ok, {bad} non-finite)" if bad else ("" if faceted else f" (n={ok})")
        handles.append(Line2D([], [], color=PALETTE[colour_of[label] % len(PALETTE)],
                              marker=MARKERS[colour_of[label] % len(MARKERS)], markersize=4,
                              label=_one_line(label, legend_names[label]) + tail))
    # The key to styles goes in the legend's title: in a column of its own it would be read as a variant.
    key = []
    if any(m.startswith("train_") for m in metrics) and any(not m.startswith("train_") for m in metrics):
        key.append("dashed = train, solid = validation")
    if _seed_counts(runs) != "one seed per variant":
        key.append("shaded band = ±1 sd across ok seeds")
    if non_finite:
        key.append("× = a non-finite run, at the epoch it stopped")
    # Faceted, the panels and the legend name their axes; otherwise the labels need their key.
    title = "\n".join(t for t in (None if faceted else _label_title(rs), "   ·   ".join(key)) if t)
    _legend_below(fig, handles, 3 if not faceted else len(handles), title=title or None)
    one = _seed_counts(runs) == "one seed per variant"
    what = ("lines are single runs (one seed per variant: no spread to show)" if one else
            f"mean over ok seeds with a ±1 sd band; {_seed_counts(runs)}")
    sub = f"{what}; {_non_finite_text(runs)}" + ("; non-finite runs left out of the means" if non_finite else "")
    if faceted:
        sub += f"; one column per {panels[0][0].split(' = ')[0]}"
    _suptitle(fig, _title(rs, "learning curves"), sub)
    return fig


# ── arms ────────────────────────────────────────────────────────────────────────────────────────
def _baseline(rs: ResultSet, baseline: str | None, labels: list[str]) -> str | None:
    """The arm to mark: named as ``lesion diff --baseline`` names it (short labels, an index,
    ``base``, older forms; an unknown one lists the labels one per line)."""
    from runtime.diff import baseline_label

    if baseline is None:
        return "base" if "base" in labels else None
    return baseline_label(rs, baseline)[0]


def _order(rows: list[dict], metric: str) -> list[str]:
    """Best first in the metric's direction; variants without an ok run last."""
    sign = -1.0 if direction(metric) == "min" else 1.0
    return [r["variant"] for r in sorted(rows, key=lambda r: (not math.isfinite(r["mean"]),
                                                             -sign * r["mean"] if math.isfinite(r["mean"]) else 0))]


def _seed_rows(n: int) -> np.ndarray:
    # Seeds on their own strip under the mean, spread evenly (not at random: the same result set
    # gives the same picture), so that equal values stay countable.
    return np.full(1, -0.22) if n == 1 else np.linspace(-0.12, -0.34, n)


def _arm_tick(name: str, row: dict, is_base: bool, single: bool) -> str:
    notes = ["baseline"] if is_base else []
    if row["non_finite"]:
        total = row["ok"] + row["non_finite"]
        notes.append(f"all {total} non-finite" if not row["ok"] else f"{row['non_finite']} of {total} non-finite")
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
    if _label_title(rs):
        axes[0].set_ylabel(_label_title(rs), fontsize=9)
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
           f"{_non_finite_text(runs)}")
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


def _as_labelled(changes: list[dict], key: str, value) -> str:
    """``value`` of axis ``key`` as the labels write it: the stored spec's canonical JSON writes
    0.0 as 0, the runs' changes keep what the spec said."""
    return next((format_value(c[key]) for c in changes if key in c and c[key] == value), format_value(value))


def _cell_text(r: dict) -> str:
    if not math.isfinite(r["mean"]):
        return f"all {r['non_finite']}\nnon-finite"
    text = f"{r['mean']:.3g}"
    if math.isfinite(r["sd"]):
        text += f"\n±{r['sd']:.2g}"
    if r["non_finite"]:
        text += f"\n{r['non_finite']} non-finite"
    return text


def _gaps_to_best(rs: ResultSet, metric: str, best: str) -> dict[str, dict]:
    """Per variant, its comparison with the best cell by ``lesion diff --baseline`` (same test,
    same adjustment), and ``gap``: |B − A| in half-widths of its 95 % interval (below 1 the
    interval holds 0; NaN without an interval)."""
    from runtime.diff import diff_baseline

    out = {best: {"gap": 0.0, "verdict": "best"}}
    for row in diff_baseline(rs, best, metrics=[metric]).rows:
        half = (row["ci_high"] - row["ci_low"]) / 2 if row["ci_low"] is not None else math.nan
        diff = row["diff"] if row["diff"] is not None else math.nan
        if not (math.isfinite(diff) and math.isfinite(half)):
            gap = math.nan  # untested (too few seeds) or non-finite: grey, not "far from the best"
        elif half > 0:
            gap = abs(diff) / half
        else:  # every seed differs by the same amount: decided, not estimated
            gap = 0.0 if diff == 0 else math.inf
        out[row["variant_b"]] = {"gap": gap, "verdict": row["verdict"]}
    return out


def plot_grid(rs: ResultSet, metrics: list[str] | None = None) -> Figure:
    """Heat map over the two axes of a grid study: colour = distance from the best cell in units
    of that comparison's uncertainty, on a fixed scale; text = mean ± sd; cells not
    distinguishable from the best (the verdict of ``lesion diff --baseline <best>``) marked."""
    ax_y, ax_x = _grid_axes(rs)
    metrics = _metrics_of(rs, metrics)
    runs = _runs_by_variant(rs)
    cell_of = {}
    stored = []
    for label, rr in runs.items():
        ch = json.loads(rr[0]["changes"])
        stored.append(ch)
        i = next(i for i, v in enumerate(ax_y["values"]) if v == ch.get(ax_y["key"]))
        j = next(j for j, v in enumerate(ax_x["values"]) if v == ch.get(ax_x["key"]))
        cell_of[label] = (i, j)
    ny, nx = len(ax_y["values"]), len(ax_x["values"])
    fig = _figure(2.2 + (1.25 * nx + 1.9) * len(metrics), 2.3 + 0.85 * ny)
    axes = fig.subplots(1, len(metrics), squeeze=False)[0]
    # Dark = close to the best on a fixed scale: cells within seed noise of the best stay as dark
    # as it, so noise does not turn into contrast.
    cmap = SEQUENTIAL.reversed().with_extremes(bad="#d9d9d9", over=SEQUENTIAL(0.0))
    for ax, m in zip(axes, metrics):
        table = {r["variant"]: r for r in summary_rows(rs, m)}
        means = {label: table[label]["mean"] for label in cell_of}
        finite = [label for label in cell_of if math.isfinite(means[label])]
        sign = -1.0 if direction(m) == "min" else 1.0
        best = max(finite, key=lambda label: sign * means[label]) if finite else None
        gaps = _gaps_to_best(rs, m, best) if best else {}
        grid = np.full((ny, nx), np.nan)
        for label, (i, j) in cell_of.items():
            grid[i, j] = gaps.get(label, {}).get("gap", math.nan)
        image = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, vmin=0.0, vmax=GAP_SCALE, aspect="auto",
                          gid=f"grid:{m}")
        for label, (i, j) in cell_of.items():
            v = grid[i, j]
            text = _cell_text(table[label])
            verdict = gaps.get(label, {}).get("verdict")
            if label == best:
                text += "\nbest"
            elif verdict in ("no detectable change", "no test possible"):
                text += "\n≈ best" if verdict == "no detectable change" else "\nuntested"
                ax.add_patch(Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False, edgecolor=PALETTE[1], linewidth=1.6,
                                       linestyle=(0, (3, 2)), gid=f"tied:{m}:{label}"))
            dark = math.isfinite(v) and v < 0.45 * GAP_SCALE
            ax.text(j, i, text, ha="center", va="center", fontsize=8.5,
                    color="white" if dark else "black", gid=f"cell:{m}:{label}")
        if best is not None:
            bi, bj = cell_of[best]
            ax.add_patch(Rectangle((bj - 0.5, bi - 0.5), 1, 1, fill=False, edgecolor=PALETTE[1], linewidth=2.5,
                                   gid=f"best:{m}:{best}"))
        ax.set_xticks(range(nx), [_as_labelled(stored, ax_x["key"], v) for v in ax_x["values"]])
        ax.set_yticks(range(ny), [_as_labelled(stored, ax_y["key"], v) for v in ax_y["values"]])
        ax.set_xlabel(ax_x["key"])
        ax.set_ylabel(ax_y["key"])
        ax.set_title(f"final {m} ({_direction_text(m)})", fontsize=9.5)
        ax.tick_params(length=0)
        for spine in ax.spines.values():
            spine.set_visible(False)
        bar = fig.colorbar(image, ax=ax, shrink=0.9, extend="max")
        bar.set_label("gap to the best cell, in half-widths\nof its 95 % interval (< 1: interval holds 0)",
                      fontsize=8.5)
    _suptitle(fig, _title(rs, f"final {', '.join(metrics)} over {ax_y['key']} × {ax_x['key']}"),
              f"cells: mean ± sd over ok seeds; colour: distance from the best cell (solid outline) on a fixed "
              f"scale; dashed: no detectable change from the best ('lesion diff --baseline', adjusted); "
              f"{_seed_counts(runs)}; {_non_finite_text(runs)}")
    return fig


# ── diff ────────────────────────────────────────────────────────────────────────────────────────
def plot_diff(rs_a: ResultSet, rs_b: ResultSet, metrics: list[str] | None = None,
              correction: str = "holm", alpha: float = 0.05, margin: float | None = None) -> Figure:
    """B − A per matched variant with the interval its verdict uses (the family's adjusted level, see
    ``runtime.stats.family_alpha``), coloured by the verdict of ``lesion diff``; ±margin dotted."""
    from runtime.diff import diff_result_sets

    report = diff_result_sets(rs_a, rs_b, metrics=metrics, correction=correction, alpha=alpha, margin=margin)
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
        margin = next((r["margin"] for r in report.rows if r["metric"] == m and r["margin"] is not None), None)
        for edge in (() if margin is None else (-margin, margin)):
            ax.axvline(edge, color="black", linewidth=0.8, linestyle=":")
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
    if _label_title(rs_a, rs_b):
        axes[0].set_ylabel(_label_title(rs_a, rs_b), fontsize=9)
    used = list(dict.fromkeys(r["verdict"] for r in report.rows))
    handles = [Line2D([], [], color=VERDICT_COLOURS[v], marker="D", linewidth=2.2, label=v) for v in used]
    level = next((r["ci_level"] for r in report.rows if r["ci_level"] is not None), 1 - alpha)
    dotted = "; dotted: ±margin" if any(r["margin"] is not None for r in report.rows) else ""
    _legend_below(fig, handles, 4, title=f"B − A and its {100 * level:.4g} % interval, the level at which the "
                                         f"adjusted p ({'Holm' if correction == 'holm' else 'Benjamini–Hochberg'}, "
                                         f"α = {alpha:g}) decides{dotted}")
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


# ── tuning budget ───────────────────────────────────────────────────────────────────────────────
def plot_budget(rs: ResultSet) -> Figure:
    """Expected best validation score against the number of runs tried, per arm, ± one sd
    (the rows of ``lesion show --budget``: :func:`runtime.tuning.budget_rows`)."""
    from runtime.tuning import budget_rows, study_of, tuned

    if not tuned(rs):
        raise PlotError("--kind budget draws the tuning inside arms; this study has no [ablation.tune]")
    rows, metric = budget_rows(rs, study_of(rs))
    fig = _figure(7.5, 4.8)
    ax = fig.subplots()
    arms = list(dict.fromkeys(r["arm"] for r in rows))
    for k, arm in enumerate(arms):
        mine = [r for r in rows if r["arm"] == arm]
        n = np.array([r["budget"] for r in mine])
        mean, sd = np.array([r["expected"] for r in mine]), np.array([r["sd"] for r in mine])
        colour = PALETTE[k % len(PALETTE)]
        ax.plot(n, mean, "-o", color=colour, markersize=3.5, label=f"{arm} ({mine[0]['trials']} runs)",
                gid=f"budget:{arm}")
        ax.fill_between(n, mean - sd, mean + sd, color=colour, alpha=0.15, linewidth=0)
    ax.set_xscale("log")
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: f"{x:g}"))
    ax.set_xlabel("runs tried (settings × seeds drawn with replacement)")
    ax.set_ylabel(f"expected best {metric}")
    ax.grid(True, alpha=0.25, linewidth=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.legend(fontsize=8.5, frameon=False, title=_label_title(rs), title_fontsize=8.5)
    _suptitle(fig, _title(rs, "expected best validation score vs tuning budget"),
              f"{metric} ({_direction_text(metric)}) at the judged epoch; band: ± one sd of the best of n "
              "draws (Dodge et al. 2019)")
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
    if kind == "budget":
        if baseline is not None or metrics:
            raise PlotError("--kind budget draws the study's tuning metric; --metric and --baseline do not apply")
        return plot_budget(rs)
    raise PlotError(f"--kind {kind!r}: expected one of {', '.join(KINDS)}")


def default_path(rs: ResultSet, kind: str) -> Path:
    return rs.path / "plots" / f"{kind}.png"


def save_figure(fig: Figure, path: str | Path) -> Path:
    """Write ``fig`` as PNG or SVG (by the suffix), ``figsize × DPI`` pixels; parent folders made."""
    path = Path(path)
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in ("png", "svg"):
        raise PlotError(f"-o {path}: expected a file ending in .png or .svg")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        _savefig(fig, path, fmt)
    except OSError as err:
        raise PlotError(f"{path}: cannot write the picture ({err.strerror or err}); choose a writable -o") from None
    return path


def svg_markup(fig: Figure, salt: str) -> str:
    """``fig`` as one ``<svg>`` element to place inside an HTML page; ``salt`` keeps its element
    ids apart from those of the page's other pictures."""
    buffer = io.StringIO()
    _savefig(fig, buffer, "svg", salt)
    text = buffer.getvalue()
    return text[text.index("<svg"):]


def _savefig(fig: Figure, target, fmt: str, salt: str = "lesion") -> None:
    # No date in the file, fixed SVG ids, text drawn as paths (no font needed where it is shown):
    # the same result set gives the same bytes.
    metadata = {"Date": None} if fmt == "svg" else {}
    with matplotlib.rc_context({"svg.hashsalt": salt, "svg.fonttype": "path"}):
        fig.savefig(target, format=fmt, dpi=DPI, metadata=metadata)
