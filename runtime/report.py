"""``lesion report``: one self-contained HTML page about a result set, to attach to a review.

Sections (each a ``<section id=…>``): ``question`` (the study's name, description and headline
metric), ``summary`` (the table of ``lesion show``), ``verdicts`` (``lesion diff RESULT --baseline
LABEL``, through :func:`runtime.diff.diff_baseline`, so the page follows its statistics),
``pictures`` (curves, arms and, for a two-axis grid, the grid, as inline SVG), ``spec`` (the
stored spec text), ``environment`` (what computed the runs) and ``replay`` (the commands that
re-execute and export them).

Nothing is loaded from anywhere: no scripts, no links, no fonts (SVG text is drawn as paths), CSS
in the page. Every text that comes from the spec or the result set (names, labels, descriptions,
the spec source, environment values) is HTML-escaped.
"""

from __future__ import annotations

import json
import math
from html import escape

from compiler.spec import direction
from runtime.formats import fmt_number
from runtime.store import ResultSet

__all__ = ["SECTIONS", "VERDICT_COLUMNS", "default_baseline", "render_report"]

SECTIONS = ("question", "summary", "verdicts", "pictures", "spec", "environment", "replay")

# The columns of ``lesion diff --format csv`` a reader of one study needs (one metric, A is the baseline).
VERDICT_COLUMNS = ["variant", "test", "n_a", "n_b", "mean_a", "mean_b", "diff", "ci_low", "ci_high", "p",
                   "p_adjusted", "verdict"]

_CSS = """
body { font: 15px/1.45 system-ui, sans-serif; color: #1d232b; margin: 2rem auto; max-width: 78rem;
       padding: 0 1.2rem; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; } h2 { font-size: 1.15rem; margin-top: 2.2rem;
     border-bottom: 1px solid #d6d9de; padding-bottom: .25rem; }
.sub { color: #555d68; margin-top: 0; } .note { color: #555d68; font-size: .9rem; }
table { border-collapse: collapse; font-size: .88rem; margin: .6rem 0; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid #e4e6ea; text-align: left; vertical-align: top; }
td.n { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td:first-child { white-space: nowrap; }
tr.base td:first-child { font-weight: 600; }
tr.better td:last-child { color: #1f6f69; font-weight: 600; }
tr.worse td:last-child { color: #b3224f; font-weight: 600; }
.wide { overflow-x: auto; }
pre { background: #f5f6f8; padding: .8rem 1rem; overflow-x: auto; font-size: .85rem; }
figure { margin: 1.2rem 0; } figure svg { max-width: 100%; height: auto; display: block; }
figcaption { color: #555d68; font-size: .88rem; }
"""


def default_baseline(rs: ResultSet) -> str:
    """``base`` when the study has it, else its first variant (of a tuned study: its first arm)."""
    from compiler.expand import arms
    from runtime.tuning import study_of, tuned

    if tuned(rs):
        labels = [a.label for a in arms(study_of(rs).variants)]
        return "base" if "base" in labels else labels[0]
    pairs = sorted(set(zip(rs.runs.column("variant_index").to_pylist(), rs.runs.column("variant_label").to_pylist())))
    labels = [label for _, label in pairs]
    return "base" if "base" in labels else labels[0]


def _opening_comment(source: str) -> str:
    """The first line of the comment a spec opens with (the examples state their question there)."""
    first = source.lstrip().splitlines()[0] if source.strip() else ""
    return first.lstrip("#").strip() if first.startswith("#") and not first.startswith("#:") else ""


def _cell(value, numeric: bool) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        text = ""  # no test, no interval: an empty cell, as in the CSV of lesion diff
    else:
        text = escape(fmt_number(value) if numeric else str(value))
    return f'<td class="n">{text}</td>' if numeric else f"<td>{text}</td>"


def _table(rows: list[dict], columns: list[str], numeric: set[str], row_class=None) -> str:
    head = "".join(f"<th>{escape(c)}</th>" for c in columns)
    body = []
    for r in rows:
        cls = row_class(r) if row_class else ""
        cells = "".join(_cell(r.get(c), c in numeric) for c in columns)
        body.append(f'<tr class="{escape(cls)}">{cells}</tr>' if cls else f"<tr>{cells}</tr>")
    return f'<div class="wide"><table><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>'


def _pictures(rs: ResultSet, baseline: str) -> list[tuple[str, str]]:
    from runtime.plot import PlotError, plot_arms, plot_budget, plot_curves, plot_grid, svg_markup
    from runtime.tuning import tuned

    figures = [("curves", "Learning curves: per-epoch means over ok seeds with ±1 sd bands.", plot_curves(rs))]
    if tuned(rs):
        # the baseline is an arm, and the variants drawn are its tuned settings: nothing to mark
        figures += [("arms", "Final values per tuned variant (arm and setting), best first, with 95 % t "
                             "intervals and every seed.", plot_arms(rs)),
                    ("budget", "Expected best validation score against the runs tried, per arm.", plot_budget(rs))]
    else:
        figures.append(("arms", f"Final values per variant, best first, with 95 % t intervals and every seed; "
                                f"baseline '{baseline}' marked.", plot_arms(rs, baseline=baseline)))
    try:
        figures.append(("grid", "The grid: colour is each cell's gap to the best cell in half-widths of its 95 % "
                                "interval; dashed cells cannot be told from the best.", plot_grid(rs)))
    except PlotError:
        pass  # not a two-axis grid: the arms say it all
    return [(caption, svg_markup(fig, f"lesion-{kind}")) for kind, caption, fig in figures]


def render_report(rs: ResultSet, baseline: str | None = None) -> str:
    """The page for result set ``rs``; verdicts against ``baseline`` (default: :func:`default_baseline`)."""
    from runtime.diff import baseline_label, diff_baseline
    from runtime.plot import label_key
    from runtime.show import SUMMARY_COLUMNS, summary_rows
    from runtime.tuning import tuned

    # The full label, however it was given: the page marks and names the arm by it.
    baseline = baseline_label(rs, baseline)[0] if baseline else default_baseline(rs)
    tree = rs.tree
    study = tree["study"]
    metric = rs.headline
    name = study["name"]
    rows = summary_rows(rs)
    report = diff_baseline(rs, baseline)
    runs = rs.runs.to_pydict()
    environment = rs.meta["environment"]
    where = escape(str(rs.path))
    sign = -1.0 if direction(metric) == "min" else 1.0
    best = max((r for r in rows if math.isfinite(r["mean"])), key=lambda r: sign * r["mean"], default=None)
    best_run = next((rid for rid, label, status in zip(runs["run_id"], runs["variant_label"], runs["status"])
                     if best and label == best["variant"] and status == "ok"), runs["run_id"][0])
    verdict_rows = [{**r, "variant": r["variant_b"]} for r in report.rows]
    key = label_key(rs)   # which axis each part of a grid cell's label is
    counts = {v: sum(r["verdict"] == v for r in report.rows) for v in ("better", "worse")}

    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{escape(name)} — lesion report</title><style>{_CSS}</style></head><body>",
        f"<h1>{escape(name)}</h1>",
        f'<p class="sub">result set <code>{where}</code> · study hash <code>{escape(rs.study_hash)}</code> · '
        f"lesion {escape(str(rs.meta['version']))}</p>",
        '<section id="question"><h2>Question</h2>',
        *(f"<p><b>{escape(line)}</b></p>" for line in [_opening_comment(rs.meta["spec_source"])] if line),
        f"<p>{escape(study.get('description') or '(the spec gives no description)')}</p>",
        f"<p>Headline metric <code>{escape(metric)}</code>; {len(rows)} variants × "
        f"{len(set(runs['seed']))} seeds = "
        f"{len(runs['run_id'])} runs, {sum(s != 'ok' for s in runs['status'])} non-finite.</p></section>",
        '<section id="summary"><h2>Summary</h2>',
        f'<p class="note">Final {escape(metric)} across seeds: mean, sample sd and 95 % t interval; '
        "non-finite runs are counted and left out (as <code>lesion show</code>)."
        + (f" Labels: {escape(key)}.</p>" if key else "</p>"),
        _table(rows, SUMMARY_COLUMNS, set(SUMMARY_COLUMNS[1:-1]),
               row_class=lambda r: "base" if r["variant"] == baseline else ""),
        "</section>",
        '<section id="verdicts"><h2>Verdicts</h2>',
        f"<p>Each variant against the baseline <b>{escape(baseline)}</b> "
        f"(<code>lesion diff RESULT --baseline</code>): {counts['better']} better, {counts['worse']} worse, "
        f"{len(report.rows) - counts['better'] - counts['worse']} without a detectable change, p-values adjusted by "
        f"{'Holm' if report.correction == 'holm' else 'Benjamini–Hochberg'} over {len(report.rows)} "
        f"comparison{'s' if len(report.rows) != 1 else ''}.</p>",
        # a tuned study's verdicts are about arms at their picks: the page says how they were picked
        *([f'<p class="note">{escape(report.notes[0])}</p>'] if tuned(rs) else []),
        _table(verdict_rows, VERDICT_COLUMNS, set(VERDICT_COLUMNS[2:-1]),
               row_class=lambda r: r["verdict"] if r["verdict"] in ("better", "worse") else ""),
        "</section>",
        '<section id="pictures"><h2>Pictures</h2>',
        *(f"<figure>{svg}<figcaption>{escape(caption)}</figcaption></figure>" for caption, svg in _pictures(rs, baseline)),
        "</section>",
        '<section id="spec"><h2>Spec</h2>',
        f'<p class="note">As stored in the result set (<code>{escape(rs.meta["spec_path"] or "")}</code>); its '
        "canonical JSON hashes to the study hash.</p>",
        f"<pre>{escape(rs.meta['spec_source'])}</pre></section>",
        '<section id="environment"><h2>Environment</h2>',
        '<p class="note">What computed the runs (recorded by <code>lesion run</code>); a run\'s bits depend on it.</p>',
        _table([{"field": k, "value": v if isinstance(v, str) else json.dumps(v)} for k, v in sorted(environment.items())],
               ["field", "value"], set()),
        "</section>",
        '<section id="replay"><h2>Replay</h2>',
        "<p>Re-execute stored runs from the result set's own spec and compare them bit for bit "
        "(exit 0 identical, 1 differs, 2 refused), or take the best run's trained network out:</p>",
        f"<pre>lesion replay {where}\nlesion replay {where} --run {escape(best_run)}\n"
        f"lesion export {where} --run {escape(best_run)} -o best.npz</pre>",
        "</section></body></html>",
    ]
    return "\n".join(parts) + "\n"
