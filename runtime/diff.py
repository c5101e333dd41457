"""``lesion diff``: did anything get better or worse between two result sets, beyond seed noise?

1. The spec diff: every canonical-JSON field whose value differs between the two studies.
2. Variant matching (``runtime.specdiff.match_variants``): by resolved configuration minus the
   changed fields (an ablation axis whose values changed counts as a change of its key), then
   by label.
3. Per matched variant and metric, the final-epoch values by seed go to ``runtime.stats.compare``
   (paired over common seeds, else Welch); the p-values of all rows are adjusted together (Holm
   by default, or Benjamini–Hochberg) and each row gets a verdict in the metric's direction.

With ``baseline`` and one result set, every variant is compared with the baseline variant of the
same study (seeds shared, so paired). With one result set and no baseline the comparisons follow
the study's design (:func:`diff_design`): for a grid, per axis its simple effects (each pair of
its levels within every combination of the other axes), its main effect (the same pairs, each
seed's values averaged over the other axes) and, for two crossed axes, their interaction; for one
change at a time or a list, each variant against the base.

Each *question* is one family: its p-values are adjusted together, its intervals are drawn at the
level α* that agrees with the adjusted p-values (``runtime.stats.family_alpha``), and each row's
verdict is read off that interval (``runtime.stats.decide``), with an optional practical margin.

:func:`resolve_variant` says how a baseline may be named.
"""

from __future__ import annotations

import itertools
import math
import re
from dataclasses import dataclass, field

import numpy as np

from compiler.errors import printable
from compiler.expand import arms, expand
from compiler.labels import BASE_LABEL, SEPARATOR, format_value, label_parts, old_label
from compiler.hashing import variant_payload
from compiler.spec import direction, known_metrics
from compiler.vocabulary import VALUE_WORDS
from runtime.sequential import Procedure, Row, Rule
from runtime.specdiff import Change, canonical_leaf, match_variants, spec_diff
from runtime.stats import (POWER, Comparison, adjust, compare, decide, detectable_difference, family_alpha,
                           interaction_test, interval, seeds_needed)
from runtime.store import SEQUENTIAL, ResultSet, ResultSetError
from runtime.tuning import arm_picks, study_of, test_metric, tuned

__all__ = ["DiffReport", "diff_result_sets", "diff_baseline", "diff_design", "resolve_variant", "name_variant", "baseline_label", "sequential_design",
           "Sequential", "decided_summary", "DECIDED_COLUMNS", "DIFF_COLUMNS", "SEEDS_COLUMNS"]

DIFF_COLUMNS = ["variant_a", "variant_b", "metric", "test", "n_a", "n_b", "mean_a", "mean_b", "diff",
                "ci_low", "ci_high", "p", "p_adjusted", "p_sign_flip", "verdict",
                "question", "contrast", "ci_level", "margin", "effect_sd", "p_improve", "p_improve_low",
                "p_improve_high", "detectable", "seeds_needed"]
SEEDS_COLUMNS = ["question", "contrast", "metric", "n_a", "sd_diff", "ci_level", "margin", "detectable",
                 "seeds_needed"]


@dataclass
class DiffReport:
    changes: list[Change]
    rows: list[dict]
    only_a: list[str] = field(default_factory=list)
    only_b: list[str] = field(default_factory=list)
    correction: str = "holm"
    same_study: bool = False
    questions: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    sequential: bool = False     # verdicts of a stopping rule (contrasts), not of a fixed design

    @property
    def worse(self) -> int:
        return sum(1 for r in self.rows if r["verdict"] == "worse")

    def extra(self) -> dict:
        return {
            "spec_changes": [c.as_dict() for c in self.changes],
            "identical_studies": self.same_study,
            "unmatched_a": self.only_a, "unmatched_b": self.only_b,
            "correction": self.correction, "questions": self.questions, "notes": self.notes,
            "sequential": self.sequential,
        }


_loaded = study_of


def _variants(rs: ResultSet, loaded=None) -> list[dict]:
    """The variants to compare: a tuned study's arms (each represented by its picks)."""
    loaded = loaded or _loaded(rs)
    return [{"label": v.label, "hash": v.hash, "payload": variant_payload(v.spec), "changes": v.changes}
            for v in (arms(loaded.variants) if tuned(rs) else loaded.variants)]


def resolve_variant(loaded, given: str, option: str = "--baseline") -> int:
    """Index of the variant ``given`` names: its full label; its index in the study; ``base`` for
    the variant whose configuration equals the spec's base (a grid cell included); the label
    format 1 gave it (``key=value, key=value``); or a short label: parts separated by ``·`` or
    ``,``, each naming one of the variant's values, or one of its changes whole, by its key's last
    dotted pieces or by value ("kind=batch, 0.0"), or a prefix of the label, matching one variant
    alone. A value word renamed since (``connect``) is read as today's (``dropconnect``) when the
    label as given names no variant."""
    return name_variant(loaded, given, option)[0]


def name_variant(loaded, given: str, option: str = "--baseline") -> tuple[int, str | None]:
    """:func:`resolve_variant`'s index, and a one-line notice when ``given`` is an old form of the
    label (format 1's, or one with a renamed word), so that a person learns today's label."""
    labels = [v.label for v in arms(loaded.variants)]
    try:
        return _resolve(loaded, given, option), _old_form(loaded, given, labels, option)
    except ResultSetError:
        respelled = _respelled(given)
        if respelled == given:
            raise
        # still no single variant: the refusal lists what the renamed word does name
        index = _resolve(loaded, respelled, option)
        return index, (f"{option} {printable(repr(given))}: read as {printable(repr(labels[index]))} "
                       f"({', '.join(f'{o!r} is now {n!r}' for o, n in _renamed_in(given))})")


def baseline_label(rs: ResultSet, given: str, option: str = "--baseline") -> tuple[str, str | None]:
    """The full label of the variant (a tuned study's arm) ``given`` names in ``rs``, and
    :func:`name_variant`'s notice: what the CLI hands on, so every reader marks the same arm."""
    loaded = _loaded(rs)
    index, notice = name_variant(loaded, given, option)
    return arms(loaded.variants)[index].label, notice


def _old_form(loaded, given: str, labels: list[str], option: str) -> str | None:
    old = [old_label(v.changes) for v in arms(loaded.variants)]
    if given in labels or old.count(given) != 1:
        return None
    return (f"{option} {printable(repr(given))}: read as {printable(repr(labels[old.index(given)]))} "
            "(the label result-set format 1 gave it)")


def _renamed_in(given: str) -> list[tuple[str, str]]:
    """(old, current) for every renamed value word written as a whole token of ``given``."""
    tokens = set(re.split(r"[\s,·=]+", given))
    return [(o, n) for words in VALUE_WORDS.values() for o, n in words.items() if o in tokens]


def _respelled(given: str) -> str:
    for o, n in _renamed_in(given):
        given = re.sub(rf"(?<![\w.-]){re.escape(o)}(?![\w.-])", n, given)
    return given


def _resolve(loaded, given: str, option: str) -> int:
    variants = arms(loaded.variants)   # a tuned study is named by its arms
    labels = [v.label for v in variants]
    if given in labels:
        return labels.index(given)
    shown = [printable(label) for label in labels]   # a label as a table printed it, escapes and all
    if given in shown:
        return shown.index(given)
    if given.isdigit() and int(given) < len(variants):
        return int(given)
    if given == BASE_LABEL:
        base = expand(loaded.spec.model_copy(update={"ablation": None}))[0].hash
        same = [i for i, v in enumerate(variants) if v.hash == base]
        if same:
            return same[0]
        return _no_variant(labels, given, option, "no variant equals the base configuration")
    old = [old_label(v.changes) for v in variants]
    if old.count(given) == 1:
        return old.index(given)
    tokens = [t.strip() for t in re.split(r"[,·]", given) if t.strip()]

    def names(token: str, part: str) -> bool:
        value = part.split("=", 1)[-1]
        return token in (part, value) or part.endswith("." + token)

    parts = [[*lab.split(SEPARATOR), *label_parts(v.changes)] for lab, v in zip(labels, variants)]
    hits = [i for i, lab in enumerate(labels)
            if lab.startswith(given) or (tokens and all(any(names(t, p) for p in parts[i]) for t in tokens))]
    if len(hits) == 1:
        return hits[0]
    if hits:
        return _no_variant([labels[i] for i in hits], given, option, f"names {len(hits)} variants", [*hits])
    return _no_variant(labels, given, option, "no such variant")


def _no_variant(labels, given, option, why, indices=None):
    # One label per line: labels themselves contain " · " (and, written by a person, anything).
    indices = indices or range(len(labels))
    raise ResultSetError("\n".join([f"{option} {printable(repr(given))}: {why}; give a label, an index or 'base':"]
                                   + [f"  {i}  {printable(lab)}" for i, lab in zip(indices, labels)]))


def _values(rs: ResultSet, cols: dict, variant_hash: str, metric: str) -> dict[int, float | None]:
    """Final values of a variant's runs by seed (None for a non-finite run); ``cols`` is
    ``rs.runs.to_pydict()``, converted once per result set. A tuned study's arm: the test score
    of its pick on each seed (``runtime.tuning``)."""
    if tuned(rs):
        column = test_metric(metric)
        for a in arm_picks(rs, _loaded(rs)):
            if a.arm.hash == variant_hash:
                return {s: (None if p is None else p.tests[column]) for s, p in a.picks.items()}
        return {}
    rs.require([metric])
    col = f"final_{metric}"
    return {cols["seed"][i]: (cols[col][i] if cols["status"][i] == "ok" else None)
            for i, h in enumerate(cols["variant_hash"]) if h == variant_hash}


def _metrics(rs: ResultSet, metrics: list[str] | None) -> list[str]:
    metrics = metrics or [rs.headline]
    for m in metrics:
        if direction(m) is None:
            raise ResultSetError(f"--metric {m!r}: no known direction (expected one of {', '.join(known_metrics())}; "
                                 "<k> a class index)")
    return metrics


def _columns(rs_a: ResultSet, rs_b: ResultSet) -> tuple[dict, dict]:
    cols_a = rs_a.runs.to_pydict()
    return cols_a, (cols_a if rs_b is rs_a else rs_b.runs.to_pydict())


def _pair_rows(pairs, rs_a, rs_b, metrics) -> list[tuple[dict, dict]]:
    """(row start, arms) per pair of variants and metric: arms are the two {seed: value} maps."""
    cols_a, cols_b = _columns(rs_a, rs_b)
    return [({"variant_a": a["label"], "variant_b": b["label"], "metric": m, "uses": frozenset((a["hash"], b["hash"]))},
             (_values(rs_a, cols_a, a["hash"], m), _values(rs_b, cols_b, b["hash"], m)))
            for a, b in pairs for m in metrics]


def _judge(question: str, items: list[tuple[dict, tuple[dict, dict]]], correction: str, alpha: float,
           margins: dict[str, float | None], power: float) -> tuple[list[dict], list[str]]:
    """One family: compare each item's arms, adjust the family's p-values, draw every interval at
    the family's level α* and read each verdict off its interval. Returns (rows, notes)."""
    comps = [compare(*arms) for _, arms in items]
    pvals = [c.p_value for c in comps]
    adjusted = adjust(pvals, method=correction)
    level = family_alpha(pvals, alpha, correction)
    rows, notes = [], []
    for (start, arms), c, p_adj in zip(items, comps, adjusted):
        margin = margins.get(start["metric"])
        lo, hi = interval(c, level)
        rows.append(_row(question, start, c, arms, level, (lo, hi), decide(lo, hi, direction(start["metric"]), margin),
                         p_adj, margin, power))
    paired = [c.n_a for c in comps if c.test == "paired"]
    if paired and 2 / 2 ** min(paired) > level:
        n = min(paired)
        notes.append(f"{question}: with {n} seeds the exact sign-flip p cannot go below 2/2^{n} = "
                     f"{2 / 2 ** n:.4g}, above the family's level {level:.4g}: it cannot confirm any verdict here")
    return rows, notes


def _row(question: str, start: dict, c: Comparison, arms: tuple, level: float, ci: tuple[float, float],
         verdict: str, p_adj: float, margin: float | None, power: float) -> dict:
    """One comparison's row: its estimate, the interval at ``level`` its verdict was read off, planning."""
    start = _shown(start)
    # the probability of improvement is P(B better than A): for a metric to minimise, B − A < 0
    flip = direction(start["metric"]) == "min"
    imp = [1 - x for x in (c.improvement, c.improvement_high, c.improvement_low)] if flip else \
        [c.improvement, c.improvement_low, c.improvement_high]
    return {
        "question": question, "contrast": start.get("contrast"), **start, "test": c.test,
        "n_a": c.n_a, "n_b": c.n_b, "mean_a": c.mean_a, "mean_b": c.mean_b, "diff": c.diff,
        "ci_level": 1 - level, "ci_low": ci[0], "ci_high": ci[1], "p": c.p_value, "p_adjusted": p_adj,
        "p_sign_flip": c.p_permutation, "margin": margin,
        "effect_sd": c.diff / c.sd_diff if c.sd_diff > 0 else math.nan,
        "p_improve": imp[0], "p_improve_low": imp[1], "p_improve_high": imp[2],
        "sd_diff": c.sd_diff, **_planning(c, level, margin, power), "verdict": verdict, "reason": _reason(c, arms),
    }


def _shown(start: dict) -> dict:
    """A contrast's fields for its row: the variants it reads (``uses``) stay internal."""
    return {k: v for k, v in start.items() if k != "uses"}


def _reason(c: Comparison, arms: tuple) -> str:
    # A variant with no stored run is an incomplete result set, not a lack of seeds.
    absent = " and ".join(side for side, values in zip("AB", arms) if isinstance(values, dict) and not values)
    return f"no test possible: {absent} stores no run of this variant (incomplete result set)" if absent else c.reason


def _planning(c: Comparison, level: float, margin: float | None, power: float) -> dict:
    """Smallest difference detectable with the seeds present, and seeds for a decision at the margin,
    both at the family's level and the given power, from the observed sd of the paired differences."""
    if c.test != "paired":
        return {"detectable": math.nan, "seeds_needed": math.nan}
    need = seeds_needed(c.sd_diff, margin, level, power) if margin is not None else math.nan
    return {"detectable": detectable_difference(c.n_a, c.sd_diff, level, power),
            "seeds_needed": need if not math.isfinite(need) else int(need)}


def _margins(rs: ResultSet, metrics: list[str], margin: float | None) -> dict[str, float | None]:
    """A margin is in one metric's units: ``--margin`` for the one metric compared, else the spec's
    ``study.margin`` for its headline metric."""
    if margin is not None:
        if len(metrics) > 1:
            raise ResultSetError("--margin is in the units of one metric: give a single --metric with it")
        if not (margin > 0 and math.isfinite(margin)):
            raise ResultSetError(f"--margin {margin}: a practical margin must be a positive number")
        return {metrics[0]: margin}
    spec_margin = rs.tree["study"].get("margin")
    return {m: (spec_margin if m == rs.tree["study"]["metric"] else None) for m in metrics}


def _report(families, correction, alpha, margins, power, sequential: Sequential | None = None, **kw) -> DiffReport:
    rows, notes, questions = [], [], []
    for question, kind, items in families:
        if not items:
            continue
        if kind == "interaction":
            got, more = _interactions(question, items, correction, alpha)
        elif sequential is not None:
            got, more = _sequential_rows(question, sequential, margins, power), []
        else:
            got, more = _judge(question, items, correction, alpha, margins, power)
        rows += got
        notes += more
        questions.append(question)
    if sequential is not None:
        p = sequential.procedure
        notes.insert(0, f"seeds chosen sequentially ({p.rule.as_dict()['rule']}; margin ±{p.rule.margin:g}, "
                        f"at most {p.rule.max_seeds} seeds, {p.rule.round} a round; looks at {_seeds_list(p.looks)} "
                        "seeds): each verdict is read off the repeated confidence interval of the look that "
                        "settled it, not off a Holm-adjusted p")
        if sequential.missing:
            notes.insert(1, "the procedure has not finished (runs of its next look are missing): run the same "
                            "`lesion run SPEC --until-decided …` again to continue it")
    return DiffReport(rows=rows, questions=questions, notes=notes, correction=correction,
                      sequential=sequential is not None, **kw)


def _seeds_list(looks: list[int]) -> str:
    return ", ".join(map(str, looks)) if looks else "none yet"


# ── seeds chosen by a stopping rule ─────────────────────────────────────────────────────────────
@dataclass
class Sequential:
    """The stopping rule replayed over a result set's stored runs (:func:`sequential_design`)."""
    procedure: Procedure
    judged: dict                 # row key -> (question, contrast fields, Comparison, arms) at its last look
    missing: dict[str, list[int]]   # variant hash -> seeds the next look needs that are not stored

    @property
    def done(self) -> bool:
        return not self.missing and self.procedure.done


def _key(question: str, start: dict) -> tuple:
    return question, start.get("contrast"), start["variant_a"], start["variant_b"], start["metric"]


def sequential_design(rs: ResultSet, rule: Rule, first: list[int], *, axis: str | None = None,
                      metric: str | None = None) -> Sequential:
    """Replay the stopping rule (:mod:`runtime.sequential`) over the questions of the study's design
    (as :func:`diff_design` asks them, interactions aside: they have no margin to settle on) from
    the stored runs: look j judges the open comparisons over the first n_j seeds of the procedure's
    sequence only. Stops at the first look whose runs are not all stored and names them
    (``missing``), so computing those and replaying again continues the procedure exactly where an
    uninterrupted one would be — the same decisions and the same seeds."""
    families = _design_families(rs, axis, [metric] if metric else None)
    contrasts = [(q, len(items), start, arms) for q, kind, items in families if kind == "contrasts"
                 for start, arms in items]
    cols = rs.runs.to_pydict()
    stored: dict[str, set] = {}
    for h, seed in zip(cols["variant_hash"], cols["seed"]):
        stored.setdefault(h, set()).add(seed)
    # A question names arms; a tuned arm's seed needs a run of every setting of the arm.
    runs_of: dict[str, list[str]] = {}
    for v in _loaded(rs).variants:
        runs_of.setdefault((v.arm or v).hash, []).append(v.hash)
    p = Procedure(rule, first)
    judged: dict = {}
    needed = frozenset().union(*(start["uses"] for _, _, start, _ in contrasts))
    while True:
        keep = set(p.seeds)
        members = sorted(h for arm in needed for h in runs_of.get(arm, [arm]))
        missing = {h: sorted(keep - stored.get(h, set())) for h in members if keep - stored.get(h, set())}
        if missing:
            return Sequential(p, judged, missing)
        rows = []
        for question, size, start, (a, b) in contrasts:
            key = _key(question, start)
            if key in p.settled:
                continue
            c = compare({s: v for s, v in a.items() if s in keep}, {s: v for s, v in b.items() if s in keep})
            judged[key] = (question, start, c, (a, b))
            rows.append(Row(key, size, c.diff, c.se, c.df, direction(start["metric"]), start["uses"]))
        p.look(rows)
        if p.done:
            return Sequential(p, judged, {})
        p.advance()
        needed = p.arms


DECIDED_COLUMNS = ["question", "contrast", "verdict", "look", "seeds", "ci_low", "ci_high", "ci_level", "fixed_seeds"]


def decided_summary(seq: Sequential, runs_spent: int, variants: int) -> tuple[list[dict], dict]:
    """Per comparison: its verdict, the look and seeds that settled it, its interval, and
    ``fixed_seeds``: the seeds a fixed study of that comparison needs at the same level α/m and
    power 0.8 (:func:`runtime.stats.seeds_needed` from the sd of its paired differences at its last
    look). Totals: the runs spent, against the runs of the fixed design the rule stops short of
    (every arm at the rule's N seeds, which has about the rule's power: an O'Brien–Fleming-type
    design needs only a few per cent more seeds at most than the fixed design of the same power)."""
    p = seq.procedure
    sizes: dict[str, int] = {}
    for q, *_ in seq.judged.values():
        sizes[q] = sizes.get(q, 0) + 1
    rows = []
    for key, (q, start, c, _) in seq.judged.items():
        state = p.settled.get(key) or p.open[key]
        need = seeds_needed(c.sd_diff, p.rule.margin, p.rule.alpha / sizes[q]) if c.test == "paired" else math.nan
        rows.append({"question": q, "contrast": start.get("contrast") or f"{start['variant_a']} → {start['variant_b']}",
                     "verdict": state.verdict, "look": state.look, "seeds": state.seeds, "ci_low": state.low,
                     "ci_high": state.high, "ci_level": 1 - state.level,
                     "fixed_seeds": int(need) if math.isfinite(need) else need})
    return rows, {"looks": list(p.looks), "runs_spent": runs_spent, "fixed_runs": variants * p.rule.max_seeds}


def _sequential_rows(question: str, seq: Sequential, margins: dict, power: float) -> list[dict]:
    """A question's rows as the stopping rule left them: each at the look that settled it (or the
    last one), its interval the repeated confidence interval of that look."""
    p = seq.procedure
    rows = []
    for key, (q, start, c, arms) in seq.judged.items():
        if q != question:
            continue
        state = p.settled.get(key) or p.open[key]
        row = _row(question, start, c, arms, state.level, (state.low, state.high), state.verdict, math.nan,
                   margins.get(start["metric"]), power)
        when = "settled" if key in p.settled else "still open"
        row["reason"] += f"; {when} at look {state.look} of the stopping rule ({state.seeds} seeds)"
        rows.append(row)
    return rows


def _ignored_keys(changes: list[Change], a_tree: dict, b_tree: dict) -> set[str]:
    """Fields to ignore when matching variants: the changed fields, plus the key of every axis (or
    listed variant's set key) whose entry changed — an axis over learning rate whose values moved
    from 0.1 to 0.001 makes learning rate the thing that was changed."""
    keys = {c.key for c in changes}
    for c in changes:
        m = re.match(r"ablation\.(axis|variant)\[(\d+)\]", c.key)
        if not m:
            continue
        for tree in (a_tree, b_tree):
            entries = (tree.get("ablation") or {}).get(m.group(1)) or []
            i = int(m.group(2))
            if i < len(entries):
                entry = entries[i]
                keys |= {entry["key"]} if m.group(1) == "axis" else set(entry.get("changes", {}))
    return keys


def diff_result_sets(rs_a: ResultSet, rs_b: ResultSet, *, metrics: list[str] | None = None,
                     correction: str = "holm", alpha: float = 0.05, margin: float | None = None,
                     power: float = POWER) -> DiffReport:
    if tuned(rs_a) != tuned(rs_b):
        raise ResultSetError("one result set tunes inside its arms and the other does not: their values are test "
                             "scores of picked settings on one side, final validation scores on the other")
    changes = spec_diff(rs_a.meta["canonical_json"], rs_b.meta["canonical_json"])
    va, vb = _variants(rs_a), _variants(rs_b)
    ignored = _ignored_keys(changes, rs_a.tree, rs_b.tree)
    pairs, only_a, only_b = match_variants(va, vb, ignored)
    metrics = _metrics(rs_a, metrics)
    items = _pair_rows([(p.a, p.b) for p in pairs], rs_a, rs_b, metrics)
    return _on_test(rs_a, _report([("B − A for each matched variant", "contrasts", items)], correction, alpha,
                                  _margins(rs_a, metrics, margin), power, changes=changes,
                                  only_a=[v["label"] for v in only_a], only_b=[v["label"] for v in only_b],
                                  same_study=not changes))


def _on_test(rs: ResultSet, report: DiffReport) -> DiffReport:
    """A tuned study's rows name the test metric their values are, and a note says how they were picked."""
    if not tuned(rs):
        return report
    metric, epoch = _loaded(rs).spec.selection
    for row in report.rows:
        row["metric"] = test_metric(row["metric"])
    report.notes.insert(0, f"arms tuned inside: each arm is, per seed, its setting with the best {metric} at the "
                           f"{epoch} epoch, scored on the test split (lesion show lists the settings picked)")
    return report


def diff_baseline(rs: ResultSet, baseline: str, *, metrics: list[str] | None = None,
                  correction: str = "holm", alpha: float = 0.05, margin: float | None = None,
                  power: float = POWER) -> DiffReport:
    metrics = _metrics(rs, metrics)
    recorded = rs.meta.get(SEQUENTIAL)
    if recorded is not None and rs.tree["ablation"]["mode"] != "grid" and baseline in ("base", BASE_LABEL):
        # each variant vs base is the design's question of a list or one-at-a-time: the rule's verdicts
        return diff_design(rs, metrics=metrics, correction=correction, alpha=alpha, margin=margin, power=power)
    report = _on_test(rs, _report(_baseline_families(rs, baseline, metrics), correction, alpha,
                                  _margins(rs, metrics, margin), power, changes=[], same_study=True))
    if recorded is not None:
        report.notes.insert(0, "the seeds of this result set were chosen sequentially for the questions of its "
                               "design: verdicts against another baseline ignore the stopping rule")
    return report


def _baseline_families(rs: ResultSet, baseline: str, metrics: list[str]) -> list:
    loaded = _loaded(rs)
    variants = _variants(rs, loaded)
    base = variants[resolve_variant(loaded, baseline)]
    pairs = [(base, v) for v in variants if v is not base]
    return [(f"each variant vs '{base['label']}'", "contrasts", _pair_rows(pairs, rs, rs, metrics))]


def diff_design(rs: ResultSet, *, axis: str | None = None, metrics: list[str] | None = None,
                correction: str = "holm", alpha: float = 0.05, margin: float | None = None,
                power: float = POWER) -> DiffReport:
    """The comparisons a study's design asks for, one family per question (see the module doc).

    For a grid, per axis K (or only ``axis``): its *simple effects* — every pair of K's levels
    (B the later level in the axis) within each combination of the other axes; its *main effect* —
    the same pairs over each seed's mean across the other axes' combinations (seeds with a non-finite
    run among them are left out); and for each other axis L the K × L interaction
    (:func:`runtime.stats.interaction_test`, seeds as subjects, other axes averaged). One change
    at a time and lists compare each variant with ``base`` (a list without it: with its first variant).

    A result set whose seeds a stopping rule chose (``lesion run --until-decided``) is judged by
    that rule, replayed over its runs (:func:`sequential_design`), for the questions it was run
    for; any other question gets the fixed-design verdicts and a note saying so.
    """
    metrics = _metrics(rs, metrics)
    margins = _margins(rs, metrics, margin)
    families = _design_families(rs, axis, metrics)
    recorded = rs.meta.get(SEQUENTIAL)
    sequential, notes = None, []
    if recorded is not None:
        rule = Rule(**{k: recorded[k] for k in ("margin", "max_seeds", "round", "alpha")})
        if (axis, metrics) == (recorded.get("axis"), [recorded["metric"]]) and margin in (None, rule.margin):
            sequential = sequential_design(rs, rule, recorded["first"], axis=axis, metric=recorded["metric"])
            margins = {recorded["metric"]: rule.margin}
        else:
            notes.append(f"the seeds of this result set were chosen sequentially for --axis {recorded.get('axis')}, "
                         f"metric {recorded['metric']}, margin {rule.margin:g}: other questions get fixed-design "
                         "verdicts that ignore the stopping rule")
    report = _report(families, correction, alpha, margins, power, sequential=sequential, changes=[],
                     same_study=True)
    report.notes[:0] = notes
    return _on_test(rs, report)


def _design_families(rs: ResultSet, axis: str | None, metrics: list[str] | None) -> list:
    """The questions of the design as (question, kind, items) families, items not yet judged."""
    metrics = _metrics(rs, metrics)
    ablation = rs.tree["ablation"]
    if ablation["mode"] != "grid":
        if axis is not None:
            raise ResultSetError(f"--axis applies to a grid; this study's ablation is {ablation['mode']!r}")
        labels = [v["label"] for v in _variants(rs)]
        # Without a base (include_base = false), the first listed variant is the reference, as
        # in the report; the question names it.
        return _baseline_families(rs, "base" if "base" in labels else labels[0], metrics)
    # the axes as written (0.0 stays 0.0, as in the labels), not as canonical JSON
    axes = [(a.key, list(a.values)) for a in _loaded(rs).spec.ablation.axis]
    keys = [k for k, _ in axes]
    if axis is not None and axis not in keys:
        raise ResultSetError(f"--axis {axis!r}: not an axis of this grid (axes: {', '.join(keys)})")
    variants = {tuple(canonical_leaf(v["changes"].get(k)) for k in keys): v for v in _variants(rs)}
    cols, _ = _columns(rs, rs)
    values = {}

    def hashes(cells: list[tuple]) -> frozenset:
        return frozenset(variants[tuple(canonical_leaf(x) for x in c)]["hash"] for c in cells)

    def arm(cell: tuple, m: str) -> dict:
        v = variants[tuple(canonical_leaf(x) for x in cell)]
        if (v["hash"], m) not in values:
            values[v["hash"], m] = _values(rs, cols, v["hash"], m)
        return values[v["hash"], m]

    def averaged(cells: list[tuple], m: str) -> dict:
        per = [arm(c, m) for c in cells]
        seeds = set.intersection(*(set(p) for p in per))
        return {s: (math.nan if any(p[s] is None for p in per) else float(np.mean([p[s] for p in per])))
                for s in sorted(seeds)}

    families = []
    for k, (key, levels) in enumerate(axes):
        if axis is not None and key != axis:
            continue
        others = [(o, vals) for o, vals in axes if o != key]
        other_text = ", ".join(o for o, _ in others)
        simple, main = [], []
        for i, j in itertools.combinations(range(len(levels)), 2):
            step = f"{format_value(levels[i])} → {format_value(levels[j])}"   # the question names the axis
            cells_i, cells_j = [], []
            for combo in itertools.product(*(vals for _, vals in others)):
                at = ", ".join(label_parts({o: x for (o, _), x in zip(others, combo)}))
                ci, cj = _cell(keys, {k: levels[i]}, combo), _cell(keys, {k: levels[j]}, combo)
                cells_i.append(ci)
                cells_j.append(cj)
                for m in metrics:
                    simple.append(({"contrast": f"{step} at {at}" if at else step,
                                    "variant_a": variants[tuple(map(canonical_leaf, ci))]["label"],
                                    "variant_b": variants[tuple(map(canonical_leaf, cj))]["label"], "metric": m,
                                    "uses": hashes([ci, cj])},
                                   (arm(ci, m), arm(cj, m))))
            if others:
                for m in metrics:
                    main.append(({"contrast": step, "variant_a": None, "variant_b": None, "metric": m,
                                  "uses": hashes(cells_i + cells_j)}, (averaged(cells_i, m), averaged(cells_j, m))))
        if others:
            families.append((f"does {key} matter at each {other_text}?", "contrasts", simple))
            families.append((f"does {key} matter on average over {other_text}?", "contrasts", main))
        else:
            families.append((f"does {key} matter?", "contrasts", simple))
        for o, (other, other_levels) in enumerate(axes):
            if o == k or (axis is None and o < k):
                continue
            rest = [(x, vals) for x, vals in axes if x not in (key, other)]
            items = []
            for m in metrics:
                grid = [[averaged([_cell(keys, {k: li, o: lj}, combo) for combo in
                                   itertools.product(*(vals for _, vals in rest))], m)
                         for lj in other_levels] for li in levels]
                items.append(({"contrast": f"{key} × {other}", "variant_a": None, "variant_b": None,
                               "metric": m}, grid))
            families.append((f"does the effect of {key} depend on {other}?", "interaction", items))
    return families


def _cell(keys: list[str], fixed: dict[int, object], combo: tuple) -> tuple:
    """A grid cell: the axes at positions ``fixed`` set as given, the others from ``combo`` in order."""
    rest = iter(combo)
    return tuple(fixed[i] if i in fixed else next(rest) for i in range(len(keys)))


def _interactions(question: str, items: list, correction: str, alpha: float) -> tuple[list[dict], list[str]]:
    """The interaction family: one repeated-measures F test per axis pair and metric, over the seeds
    complete in every cell, adjusted together; its verdict has no direction and no margin (an F test
    says only whether the effect of one axis changes with the other)."""
    rows, tests = [], []
    for start, grid in items:
        seeds = sorted(set.intersection(*(set(cell) for row in grid for cell in row)))
        y = np.array([[[cell[s] for cell in row] for row in grid] for s in seeds], dtype=float).reshape(
            len(seeds), len(grid), len(grid[0]))
        y = y[np.all(np.isfinite(y), axis=(1, 2))]
        if len(y) >= 2:
            f, df1, df2, p = interaction_test(y)
            reason = (f"two-way repeated-measures F = {f:.4g} on ({df1:g}, {df2:g}) df over {len(y)} seeds "
                      "complete in every cell, sphericity assumed")
        else:
            f, p, reason = math.nan, math.nan, "no test possible: fewer than 2 seeds complete in every cell"
        tests.append((start, len(y), p, reason))
    adjusted = adjust([p for *_, p, _ in tests], method=correction)
    for (start, n, p, reason), p_adj in zip(tests, adjusted):
        verdict = "no test possible" if math.isnan(p_adj) else \
            "interacts" if p_adj <= alpha else "no detectable interaction"
        rows.append({"question": question, **start, "test": "rm-anova", "n_a": n, "n_b": n, "p": p,
                     "p_adjusted": p_adj, "verdict": verdict, "reason": reason})
    return rows, []
