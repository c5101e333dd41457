"""The ``lesion`` command line: one function per command; each loads, calls and prints.

Contract:

- a user error (a :class:`~compiler.errors.UserError`, e.g. a :class:`SpecError`) raised by any command is
  printed to stderr, one problem per line (``FILE:LINE: key.path: what is wrong``), and the exit
  code is 2, without a traceback; anything else is a bug and surfaces as one;
- output meant for programs (``--format json``) goes to stdout alone;
- nothing here imports jax at import time: ``check`` and ``schema`` must stay fast, and commands
  that need it import it inside their function.
"""

from __future__ import annotations

import math
import sys

from runtime.start import started, stop_while_starting

if __name__ == "__main__":  # `python -m runtime.cli`: before the imports below, as runtime.start.main
    stop_while_starting()

import errno
import json
import os
import time
from enum import Enum
from pathlib import Path

import typer
from typer.core import TyperCommand, TyperGroup

from compiler.errors import UserError, printable

__all__ = ["app", "main"]


class UsageError(UserError):
    """Arguments that do not fit together (a one-line message, exit 2)."""


def _examples_kept(text: str | None) -> str | None:
    """Help text whose example paragraphs (``lesion ...``) click prints as written: rewrapped to a
    narrow terminal, an option's name or a comment would be broken onto a line of its own."""
    if not text:
        return text
    return "\n\n".join(f"\b\n{p}" if p.lstrip().startswith("lesion ") else p for p in text.split("\n\n"))


class _Examples:
    def format_help_text(self, ctx, formatter) -> None:
        written = self.help
        self.help = _examples_kept(written)
        try:
            super().format_help_text(ctx, formatter)
        finally:
            self.help = written


class _Group(_Examples, TyperGroup):
    """Turns a user error raised by any command into its printed problems and exit code 2, and
    Ctrl-C into exit 130."""

    def invoke(self, ctx: typer.Context):
        try:
            started()
            return super().invoke(ctx)
        except KeyboardInterrupt:  # Ctrl-C outside `run`'s own handling: nothing of lesion's is half-written
            typer.echo("interrupted", err=True)
            raise typer.Exit(130) from None
        except UserError as err:
            for line in str(err).splitlines() or [type(err).__name__]:
                typer.echo(printable(line), err=True)
            raise typer.Exit(2) from None


class _Command(_Examples, TyperCommand):
    """Usage lines name a required argument as its help does (SPEC), not in braces ({SPEC})."""

    def collect_usage_pieces(self, ctx):
        return [p[1:-1] if p.startswith("{") and p.endswith("}") else p for p in super().collect_usage_pieces(ctx)]


def _version(value: bool) -> None:
    if value:
        from importlib.metadata import version
        typer.echo(f"lesion {version('lesion')}")
        raise typer.Exit()


app = typer.Typer(
    cls=_Group,
    name="lesion",
    help="Declarative ablation studies of neural-network training choices, compiled to JAX.\n\n"
         "A study is one TOML file: a base configuration and an [ablation] that derives variants from it.\n\n"
         "Examples:\n\n"
         "  lesion check specs/cold-chain.toml\n\n"
         "  lesion run specs/cold-chain.toml     # prints the result set's path last\n\n"
         "  lesion show results/cold-chain-af23c1abfa5f\n\n"
         "  lesion replay results/cold-chain-af23c1abfa5f\n\n"
         "  lesion diff results/cold-chain-af23c1abfa5f --axis normalization.kind \\\n"
         "    --margin 0.005\n\n"
         "  lesion seeds results/cold-chain-af23c1abfa5f --margin 0.005   # plan seeds\n\n"
         "  lesion run specs/cold-chain.toml --until-decided --margin 0.005  # add seeds\n\n"
         "  lesion diff results/A results/B --fail-on worse\n\n"
         "  lesion report results/cold-chain-af23c1abfa5f   # one HTML page for a review\n\n"
         "  lesion export results/cold-chain-af23c1abfa5f --run d7126c08adb5b38b-s2 \\\n"
         "    -o best.npz\n\n"
         "  lesion schema > lesion.schema.json",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
    pretty_exceptions_enable=False,
)


@app.callback()
def _main(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print lesion's version and exit.")) -> None:
    pass


class Format(str, Enum):
    table = "table"
    json = "json"


_WIDE_HELP = "Every column, one line per row, whatever the terminal's width."


class Output(str, Enum):
    table = "table"
    json = "json"
    csv = "csv"
    markdown = "markdown"


@app.command(cls=_Command)
def check(
    spec: Path = typer.Argument(..., metavar="SPEC", help="The study's TOML spec file.", show_default=False),
    format: Format = typer.Option(Format.table, "--format", "-f", help="table for people, json for programs."),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """Validate a spec and its data files; list the variants and runs it expands to; exit 2 listing
    every problem.

    Examples:

      lesion check specs/cold-chain.toml

      lesion check specs/cold-chain.toml --format json
    """
    study = _load_runnable(spec)
    if format is Format.json:
        # ASCII: labels and values are the user's text, and JSON's \u escapes keep them exact
        # while no control or bidirectional character reaches the terminal.
        typer.echo(json.dumps(_check_report(study), indent=2))
        return
    _print_check_table(study, wide)


def _load_runnable(spec: Path):
    """The loaded study, once its spec and its data files' metadata (columns, rows, memory) hold
    no problem; every problem at once otherwise."""
    from compiler.data import check_files
    from compiler.loader import load_study
    from runtime.guard import data_room

    study = load_study(spec)
    check_files(study, room=data_room())
    for line in study.notices:   # old words, read as today's (compiler.vocabulary)
        typer.echo(f"notice: {printable(line)}", err=True)
    return study


def _study_metrics(study) -> list[str]:
    """The metrics every variant of the study stores, which --metric and study.metric accept (a
    variant may change the class count)."""
    from compiler.spec import classes_of, metrics_of, task_of

    each = [metrics_of(task_of(v.spec.data), classes_of(v.spec.data)) for v in study.variants]
    return [m for m in each[0] if all(m in other for other in each[1:])]


def _check_report(study) -> dict:
    return {
        "spec": study.path,
        "study": study.spec.study.name,
        "study_hash": study.study_hash,
        "result_set": study.result_set,
        "seeds": study.seeds,
        "programs": len({v.program for v in study.variants}),
        "runs": study.runs,
        "metric": study.spec.study.metric,
        "metrics": _study_metrics(study),
        "variants": [
            {"label": v.label, "changes": v.changes, "variant_hash": v.hash, "program": v.program,
             "seeds": study.seeds}
            for v in study.variants
        ],
    }


def _print_check_table(study, wide: bool) -> None:
    from compiler.labels import axis_names, label_parts
    from compiler.spec import spelled_metrics
    from runtime.formats import Fit, render

    keys = sorted({v.program for v in study.variants}, key=[v.program for v in study.variants].index)
    typer.echo(f"study       {study.spec.study.name}")
    typer.echo(f"study hash  {study.study_hash}")
    typer.echo(f"result set  {study.result_set}")
    _echo_fitted(f"metrics     {spelled_metrics(_study_metrics(study))} (headline: {study.spec.study.metric})", wide)
    typer.echo(f"{len(study.variants)} variants × {len(study.seeds)} seeds = {study.runs} runs, "
               f"compiled as {len(keys)} program{'s' if len(keys) != 1 else ''}")
    tune = study.spec.ablation.tune if study.spec.ablation is not None else None
    if tune is not None:
        from compiler.expand import arms

        metric, epoch = study.spec.selection
        typer.echo(f"tuned: {len(arms(study.variants))} arms × {len(tune.settings)} settings; "
                   f"picked per seed on {metric} ({epoch} epoch)")
    seeds = _seeds_text(study.seeds)
    abl = study.spec.ablation
    generated = abl is not None and abl.mode != "list"
    if generated:
        # A generated label is values alone: say once which keys they are, in label order.
        # The short names are what pictures key their labels by (runtime.plot.label_key).
        names = axis_names([(a.key, a.name) for a in abl.axis])
        # no-break spaces (see _echo_fitted): a wrapped line never parts a name from its key
        keys = ", ".join(f"{names[a.key]}\u00a0=\u00a0{a.key}" for a in abl.axis if names[a.key] != a.key)
        what = keys if abl.mode != "grid" else \
            " · ".join(names[a.key] for a in abl.axis) + (f" ({keys})" if keys else "")
        _echo_fitted(printable(f"labels      {what}"), wide)
    rows = []
    for v in study.variants:
        changes = ", ".join(label_parts(v.changes)) or "(nothing: the base)"
        # A generated label already tells its changes (with the line above); the column then
        # stays empty, and is left out when every label is generated.
        rows.append({"#": v.index, "label": v.label, "changes": "" if generated else changes,
                     "variant hash": v.hash[:12], "seeds": seeds, "program": v.program})
    typer.echo(render(rows, list(rows[0]), "table", width=_terminal_width(wide),
                      fit=Fit(keep=("#", "label"), drop=("program", "seeds"), wrap=("label", "changes"))))


def _terminal_width(wide: bool = False) -> int | None:
    """The width tables are fitted to; None (every column, one line per row) with --wide, or when
    stdout is piped and COLUMNS is not set: there is no width to respect, and grep wants whole rows."""
    import os
    import shutil
    if wide or not (sys.stdout.isatty() or os.environ.get("COLUMNS", "").isdigit()):
        return None
    return shutil.get_terminal_size().columns


def _echo_fitted(text: str, wide: bool = False) -> None:
    """A line of prose, wrapped at the terminal's width like the tables above it."""
    import textwrap

    width = _terminal_width(wide)
    # a no-break space only keeps words together on one line; it is printed as a space
    typer.echo((text if width is None else textwrap.fill(text, width, subsequent_indent="  ")).replace("\u00a0", " "))


def _seeds_text(seeds: list[int]) -> str:
    if len(seeds) > 3 and seeds == list(range(seeds[0], seeds[0] + len(seeds))):
        return f"{seeds[0]}..{seeds[-1]}"
    return ",".join(map(str, seeds))


@app.command(cls=_Command)
def schema() -> None:
    """Print the JSON Schema (draft 2020-12) of a spec file, for editors that complete keys.

    Examples:

      lesion schema > lesion.schema.json

    then put  #:schema ./lesion.schema.json  on the first line of a spec (editors using taplo),
    or associate the schema with specs/*.toml in the editor's settings.
    """
    from compiler.schema import spec_schema

    typer.echo(json.dumps(spec_schema(), indent=2, ensure_ascii=False))


def _err(text: str) -> None:
    typer.echo(text, err=True)


@app.command(cls=_Command)
def run(
    spec: Path = typer.Argument(..., metavar="SPEC", help="The study's TOML spec file.", show_default=False),
    results: Path = typer.Option(Path("results"), "--results", metavar="DIR",
                                 help="Folder that receives the result set (-o/--out name a file in every command)."),
    old_out: Path = typer.Option(None, "--out", "-o", hidden=True),
    lanes: int = typer.Option(None, "--lanes", min=1, max=4096, metavar="N",
                              help="Runs per compiled program call (lane width); default: chosen per program."),
    fresh: bool = typer.Option(False, "--fresh", help="Recompute every run, even those already stored."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars or summary on stderr."),
    cluster: str = typer.Option(None, "--cluster", metavar="ADDRESS",
                                help="Run the groups on a Dask scheduler (tcp://HOST:PORT) or on N local "
                                     "worker processes (local:N); results are written here."),
    until_decided: bool = typer.Option(False, "--until-decided",
                                       help="Add seeds in rounds to the arms whose questions are still open, "
                                            "until each is better, worse or equivalent (a group-sequential "
                                            "stopping rule that keeps its error rates) or --max-seeds is reached."),
    margin: float = typer.Option(None, "--margin", metavar="D", help="With --until-decided: the practical margin in "
                                 "the metric's units (default: the spec's study.margin)."),
    max_seeds: int = typer.Option(None, "--max-seeds", min=2, max=10_000, metavar="N",
                                  help="With --until-decided: at most N seeds per arm (default: 4 × the spec's)."),
    round_: int = typer.Option(None, "--round", min=1, max=10_000, metavar="K",
                               help="With --until-decided: seeds added per round (default: the spec's count)."),
    axis: str = typer.Option(None, "--axis", metavar="KEY", help="With --until-decided on a grid: decide only "
                             "this axis's questions (as lesion diff --axis)."),
    workers: int = typer.Option(None, "--workers", "-j", min=1, max=4096, metavar="N",
                                help="Compile groups computed side by side in N processes on this machine "
                                     "(default: one per usable CPU); a run's bits do not depend on N."),
) -> None:
    """Run every variant × seed of a study and store the result set; print its path last.

    Runs already stored with the same run id and the same numerics environment are kept, so
    re-running an interrupted study finishes only what is missing.

    Examples:

      lesion run specs/cold-chain.toml

      lesion run specs/cold-chain.toml --results /tmp/results --lanes 16 --quiet

      lesion run specs/cold-chain.toml --cluster local:4

      lesion run specs/cold-chain.toml --until-decided --margin 0.005 \\
        --max-seeds 40 --round 5
    """
    from runtime.interrupt import Interrupted, interrupt_guard

    if not until_decided and (margin, max_seeds, round_, axis) != (None, None, None, None):
        raise UsageError("--margin, --max-seeds, --round and --axis belong to --until-decided")
    if until_decided and fresh:
        raise UsageError("--fresh recomputes a fixed set of runs; a procedure's seeds depend on its looks: "
                         "give --results another folder to start it over")
    if cluster is not None and workers is not None:
        _err("--workers and --cluster: choose one (a cluster's workers are its own processes)")
        raise typer.Exit(2)
    if old_out is not None:
        # -o/--out name a file elsewhere (plot, report, export); run's folder was --out before.
        _err(f"notice: --out is now --results for run's folder (read as --results {printable(str(old_out))})")
        results = old_out

    # Before anything heavy is imported: from here on Ctrl-C only asks the run to stop at its
    # next safe point (runtime/interrupt.py says why).
    with interrupt_guard("interrupted again: stopping at once; finished groups are stored") as ctrl_c:

        study = _load_runnable(spec)
        folder = results / study.result_set
        try:
            ctrl_c.check()
            from runtime.environment import usable_cores
            from runtime.runner import run_study  # imports jax: after the spec and its data are known to be good

            ctrl_c.check()
            progress = None if quiet else _RunProgress(study)
            executor = None
            if cluster is not None:
                from runtime.cluster import DaskExecutor
                executor = DaskExecutor(cluster, on_warning=lambda text: _err(f"warning: {text}"))
            rule = _stopping_rule(study, margin, max_seeds, round_, axis) if until_decided else None
            with executor or _nothing(), progress or _nothing():
                kw = dict(lanes=lanes, progress=progress, executor=executor, checkpoint=ctrl_c.check,
                          workers=workers or usable_cores(),
                          on_wait=lambda: _err("waiting: another 'lesion run' is writing this result set"))
                if rule is None:
                    report = run_study(study, results, fresh=fresh, **kw)
                else:
                    from runtime.runner import run_until_decided
                    looks, decided = run_until_decided(study, results, rule, axis=axis, **kw)
                    report = _looks_total(looks)
        except Interrupted:
            if fresh:
                from runtime.store import STAGING
                _err(f"interrupted: the stored result set in {folder} is unchanged; the runs recomputed so far "
                     f"are kept in {folder / STAGING}, and the same command (with --fresh) computes only the "
                     "rest, then replaces the stored runs")
            else:
                _err(f"interrupted: finished groups are stored in {folder}; "
                     f"run the same command again to compute only what is missing")
            raise typer.Exit(130) from None
    if not quiet:
        _err(f"{report.planned} runs: {report.computed} computed, {report.reused} already stored; "
             f"{report.non_finite} non-finite; {report.groups} groups, "
             f"compile {report.compile_seconds:.1f} s, run {report.run_seconds:.1f} s")
        for w in report.warnings:
            _err(f"warning: {w}")
    if until_decided:
        _print_decided(decided, report.planned, len(study.variants), quiet)
    typer.echo(str(report.path))


def _looks_total(looks):
    """One summary line for all the looks of a procedure: its runs are every run of the result set."""
    import dataclasses

    from runtime.store import open_result_set

    computed = sum(r.computed for r in looks)
    spent = open_result_set(looks[-1].path).runs.num_rows
    return dataclasses.replace(looks[-1], planned=spent, computed=computed, reused=spent - computed,
                               non_finite=sum(r.non_finite for r in looks), groups=sum(r.groups for r in looks),
                               warnings=[w for r in looks for w in r.warnings],
                               compile_seconds=sum(r.compile_seconds for r in looks),
                               run_seconds=sum(r.run_seconds for r in looks))


def _stopping_rule(study, margin, max_seeds, round_, axis):
    from runtime.sequential import Rule

    margin = study.spec.study.margin if margin is None else margin
    if margin is None or not (margin > 0 and math.isfinite(margin)):
        raise UsageError("--until-decided needs a positive practical margin: give --margin D (in the metric's "
                         "units) or set study.margin")
    first = len(study.seeds)
    max_seeds = 4 * first if max_seeds is None else max_seeds
    if max_seeds <= first:
        raise UsageError(f"--max-seeds {max_seeds}: the spec already runs {first} seeds; give more")
    if axis is not None:
        keys = [a.key for a in study.spec.ablation.axis] if study.spec.ablation.mode == "grid" else []
        if axis not in keys:
            raise UsageError(f"--axis {axis!r}: not an axis of this grid" + (f" (axes: {', '.join(keys)})" if keys else
                                                                             " (the study is not a grid)"))
    return Rule(float(margin), max_seeds, first if round_ is None else round_)


def _print_decided(decided, spent: int, variants: int, quiet: bool) -> None:
    """Which look settled each question, and the runs spent against a fixed design of the same power."""
    from runtime.diff import DECIDED_COLUMNS, decided_summary
    from runtime.formats import Fit, render

    rows, totals = decided_summary(decided, spent, variants)
    if quiet:
        return
    looks = ", ".join(map(str, totals["looks"]))
    fit = Fit(keep=("contrast", "verdict", "look", "seeds"), drop=("question", "ci_level", "fixed_seeds"),
              wrap=("contrast", "question"))
    typer.echo(render(rows, DECIDED_COLUMNS, "table", title=f"decided at looks of {looks} seeds",
                      width=_terminal_width(False), fit=fit), err=True)
    _err(f"runs spent: {spent}, against {totals['fixed_runs']} for every arm at {decided.procedure.rule.max_seeds} "
         "seeds; fixed_seeds: what a fixed study of each comparison needs for the same power at its observed sd")


class _nothing:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


class _RunProgress:
    """Progress on stderr: a bar per group that says when it is compiling, then counts
    epochs as they finish; and a bar for the whole study, in runs, with the finishing estimate.
    Worker processes compute several groups at once: every event names its group."""

    def __init__(self, study, console=None):
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

        self.progress = Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.fields[count]}"),
                                 TimeElapsedColumn(), TextColumn("{task.fields[left]}"),
                                 console=console or Console(stderr=True), transient=False)
        self.study = None
        self.groups = 0
        self.index = 0
        self.runs_done = 0
        self.started = 0.0
        # per group id: its task, label, runs, epochs done of its total, and when its first epoch ended
        self.bars: dict[str, dict] = {}

    def __enter__(self):
        self.progress.__enter__()
        return self

    def __exit__(self, *exc):
        return self.progress.__exit__(*exc)

    def __call__(self, event, **info):
        if event == "plan":
            # `--until-decided` plans once per look: each look counts its own runs and groups.
            self.groups, self.index, self.runs_done = info["groups"], 0, 0
            self.bars = {}
            if info["runs"] == 0:
                self.progress.console.print(f"all {info['planned']} runs already stored")
                return
            if info.get("estimate") is not None:
                self.progress.console.print(f"{info['runs']} runs to compute: needs {info['estimate'].describe()}")
            self.started = time.monotonic()
            self.study = self.progress.add_task("study", total=info["runs"], count=f"0/{info['runs']} runs", left="")
        elif event == "group":
            g = info["group"]
            self.index += 1
            label = f"group {self.index}/{self.groups} ({len(g.runs)} runs, width {g.lane_width})"
            epochs = g.runs[0].variant.spec.training.epochs
            # Until the first epoch ends the program is being compiled (or loaded from the cache).
            task = self.progress.add_task(f"{label} compiling", total=epochs, count=f"0/{epochs} epochs", left="")
            self.bars[g.group_id] = {"task": task, "label": label, "runs": len(g.runs), "done": 0,
                                     "total": epochs, "first": 0.0}
        elif event == "epoch":
            bar = self.bars.get(info["group"].group_id)
            if bar is None:
                return
            done, total = info["done"], info["total"]
            if done == 1:
                bar["first"] = time.monotonic()
            bar["done"], bar["total"] = done, total
            # Epochs after the first take alike; the first also pays for loading the program.
            left = (time.monotonic() - bar["first"]) / (done - 1) * (total - done) if done > 1 and bar["first"] else None
            self.progress.update(bar["task"], description=bar["label"], completed=done, total=total,
                                 count=f"{done}/{total} epochs", left=_left(left))
            self._study()
        elif event == "stored":
            g = info["group"]
            self.runs_done += len(g.runs)
            bar = self.bars.pop(g.group_id, None)
            if bar is not None:
                self.progress.update(bar["task"], description=bar["label"], completed=bar["total"],
                                     count=f"{bar['total']}/{bar['total']} epochs", left="")
            self._study()

    def _study(self) -> None:
        if self.study is not None:
            # stored runs, and the part of each group under way that its epochs say is done
            runs = self.runs_done + sum(b["runs"] * b["done"] / b["total"] for b in self.bars.values())
            total = self.progress.tasks[self.study].total
            # Compiles included: the time so far per run done, times the runs still to do.
            left = (time.monotonic() - self.started) / runs * (total - runs) if runs else None
            self.progress.update(self.study, completed=runs, count=f"{int(runs)}/{int(total)} runs", left=_left(left))


def _left(seconds: float | None) -> str:
    if seconds is None:
        return ""
    if seconds < 1:
        return "under 1 s left"
    minutes, secs = divmod(round(seconds), 60)
    return f"about {minutes}:{secs:02d} left"


@app.command(cls=_Command)
def show(
    result: Path = typer.Argument(..., metavar="RESULT", help="A result set folder written by 'lesion run'.", show_default=False),
    format: Output = typer.Option(Output.table, "--format", "-f", help="table, json, csv or markdown."),
    curves: bool = typer.Option(False, "--curves", help="Per-epoch means per variant instead of the summary."),
    metric: list[str] = typer.Option(None, "--metric", "-m", metavar="METRIC",
                                     help="Metric(s) to show, the option repeated for several (default: the study's)."),
    runs: bool = typer.Option(False, "--runs", help="One row per run, with the run id that 'lesion replay --run' takes."),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
    budget: bool = typer.Option(False, "--budget", help="A tuned study: per arm, the expected best validation "
                                "score of n runs tried, n = 1 … all (Dodge et al. 2019)."),
) -> None:
    """Summarize a result set per variant: runs ok/non-finite, mean ± sd and 95 % CI across seeds.
    A tuned study ([ablation.tune]) adds its arms: the settings picked on validation, the test score.

    Examples:

      lesion show results/cold-chain-af23c1abfa5f

      lesion show results/cold-chain-af23c1abfa5f --metric val_accuracy \\
        --metric val_macro_f1

      lesion show results/cold-chain-af23c1abfa5f --runs

      lesion show results/cold-chain-af23c1abfa5f --curves --format csv
    """
    import dataclasses

    from runtime.audit import audit
    from runtime.formats import Fit, render
    from runtime.show import (CURVES_FIT, RUNS_FIT, SUMMARY_COLUMNS, SUMMARY_FIT, axis_values, curve_rows, run_rows,
                              summary_rows)
    from runtime.store import open_result_set

    from runtime import tuning

    if sum((curves, runs, budget)) > 1:
        raise UsageError("give one of --curves, --runs and --budget")
    rs = open_result_set(result)
    findings = _print_audit(audit(rs))
    name = rs.tree["study"]["name"]
    metrics = metric or [rs.headline]
    is_tuned = tuning.tuned(rs)
    if budget and not is_tuned:
        raise UsageError("--budget applies to a study that tunes inside its arms ([ablation.tune])")
    if budget:
        rows, chooser = tuning.budget_rows(rs, tuning.study_of(rs))
        columns, fit = tuning.BUDGET_COLUMNS, Fit(keep=("arm", "budget", "expected"), wrap=("arm",))
        title = (f"{name} ({rs.study_hash[:12]}): expected best {chooser} of n runs tried per arm "
                 "(drawn with replacement; Dodge et al. 2019)")
    elif curves:
        rows, columns = curve_rows(rs, metric or None)
        fit = CURVES_FIT
        title = f"{name} ({rs.study_hash[:12]}): per-epoch means over ok runs"
    elif runs:
        rows, columns = run_rows(rs, metrics)
        fit = dataclasses.replace(RUNS_FIT, keep=RUNS_FIT.keep + tuple(metrics))
        title = f"{name} ({rs.study_hash[:12]}): {len(rows)} runs, final {', '.join(metrics)}"
    else:
        rows = [r for m in metrics for r in summary_rows(rs, m)]
        columns, fit = SUMMARY_COLUMNS, SUMMARY_FIT
        if len(metrics) > 1:
            order = [r["variant"] for r in rows]
            rows.sort(key=lambda r: order.index(r["variant"]))
            fit = dataclasses.replace(SUMMARY_FIT, keep=SUMMARY_FIT.keep + ("metric",),
                                      drop=tuple(c for c in SUMMARY_FIT.drop if c != "metric"))
        title = f"{name} ({rs.study_hash[:12]}): final {', '.join(metrics)} across seeds (mean, sd, 95% CI)"
    extra = {"findings": findings}
    rule = rs.meta.get("sequential")
    if rule is not None:
        # The per-variant intervals above are plain t intervals; the decisions are diff's.
        title += (f"; seeds chosen sequentially (margin ±{rule['margin']:g}, at most {rule['max_seeds']} seeds, "
                  f"{rule['round']} a round): lesion diff gives the stopping rule's verdicts")
        extra["sequential"] = rule
    if format in (Output.json, Output.csv):
        # Programs get the varied keys' values as fields of their own, named as the Parquet columns
        # they would query, not only inside the label; a CSV has no header block, so each of its rows
        # names the study it came from (CSVs of several studies can then be concatenated).
        keys, values = axis_values(rs)
        rows = [{**r, **values.get(r.get("variant", r.get("arm")), {})} for r in rows]
        columns = [*columns, *keys]
        if format is Output.csv:
            rows = [{"study_hash": rs.study_hash, **r} for r in rows]
            columns = ["study_hash", *columns]
        extra.update(study=name, study_hash=rs.study_hash, metrics=metrics, axes=keys)
    if is_tuned and not (curves or runs or budget):
        arms = tuning.arm_rows(rs, tuning.study_of(rs), metrics[0])
        chooser, epoch = tuning.study_of(rs).spec.selection
        arm_title = (f"arms: per seed the setting with the best {chooser} at the {epoch} epoch; "
                     f"{tuning.test_metric(metrics[0])} of the picks (mean, sd, 95% CI)")
        if format in (Output.json, Output.csv):
            extra["arms"] = [{**arm, **values.get(arm["arm"], {})} for arm in arms]
        else:
            typer.echo(render(rows, columns, format.value, title=title, width=_terminal_width(wide), fit=fit))
            typer.echo()
            rows, columns, title = arms, tuning.ARM_COLUMNS, arm_title
            fit = Fit(keep=("arm", "picked", "mean", "ci_low", "ci_high", "settings"), drop=("sd",),
                      wrap=("arm", "settings"))
    typer.echo(render(rows, columns, format.value, title=title, extra=extra, width=_terminal_width(wide), fit=fit))


def _print_audit(check, side: str = "") -> list[str]:
    """A result set's findings on stderr, so stdout stays the report (and valid JSON); returned
    for the JSON report too."""
    lines = [f"warning: {side}{x}" for x in check.warnings()] + [f"note: {side}{x}" for x in check.notes()]
    for line in lines:
        _err(line)
    return lines


@app.command(cls=_Command)
def replay(
    result: Path = typer.Argument(..., metavar="RESULT", help="A result set folder written by 'lesion run'.", show_default=False),
    run: str = typer.Option(None, "--run", metavar="RUN_ID",
                           help="Replay this run id (a prefix replays every run it starts; 'lesion show --runs' lists them)."),
    variant: str = typer.Option(None, "--variant", metavar="LABEL", help="Replay the runs of this variant label."),
    format: Format = typer.Option(Format.table, "--format", "-f", help="table for people, json for programs."),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """Re-execute stored runs (all of them by default) from the result set's own spec and compare
    every cell the re-execution decides, bit for bit.

    Exit 0 when every replayed run is identical, 1 when any differs or is missing or the tables
    were edited after writing, 2 when the result set is refused (edited spec, duplicated runs,
    changed data file) or the arguments are wrong.

    Examples:

      lesion replay results/cold-chain-af23c1abfa5f

      lesion replay results/cold-chain-af23c1abfa5f --variant "batch · 0.15"
    """
    if run is not None and variant is not None:
        raise UsageError("give --run or --variant, not both")
    from runtime.formats import Fit, render
    from runtime.replay import replay as do_replay

    report = do_replay(result, run=run, variant=variant,
                       on_group=None if format is Format.json else
                       (lambda g: _err(f"replaying {len(g.runs)} run(s) at lane width {g.lane_width} ...")))
    rows = [r.as_dict() for r in report.rows]
    columns = ["run_id", "variant", "seed", "lane_width", "verdict", "first_epoch", "first_metric",
               "max_abs", "max_rel", "param_hash", "cells"]
    if format is Format.json:
        typer.echo(json.dumps({"result_set": str(report.path), "identical": report.identical,
                               "environment_changes": report.environment_changes,
                               "warnings": report.warnings, "notes": report.notes, "runs": rows}, indent=2))
    else:
        if report.environment_changes:
            typer.echo("environment differs from the recorded one:")
            for line in report.environment_changes:
                typer.echo(f"  {line}")
        else:
            typer.echo("environment: same as recorded")
        for line in report.warnings:
            typer.echo(f"warning: {line}")
        for line in report.notes:
            typer.echo(f"note: {line}")
        typer.echo(render([{**r, "cells": ", ".join(r["cells"])} for r in rows], columns, "table", title="replay",
                          width=_terminal_width(wide),
                          fit=Fit(keep=("run_id", "verdict", "cells"), drop=("lane_width", "max_rel", "param_hash"),
                                  wrap=("variant", "cells"))))
        differing = sum(r.verdict == "differs" for r in report.rows)
        missing = sum(r.verdict == "missing" for r in report.rows)
        if differing and report.environment_changes:
            typer.echo(f"{differing} run(s) differ, and the environment changed (above): differing bits are "
                       "expected from such a change; replay in the recorded environment to test the code")
        elif differing:
            typer.echo(f"{differing} run(s) differ in the recorded environment: the result set or the code changed")
        if missing:
            typer.echo(f"{missing} run(s) missing: the result set is incomplete")
        if report.edited and not differing:
            typer.echo("every replayed cell reproduces, but the result set was edited after it was written (above)")
        if report.identical:
            typer.echo(f"all {len(rows)} replayed run(s) identical")
    if not report.identical:
        raise typer.Exit(1)


@app.command(cls=_Command)
def export(
    result: Path = typer.Argument(..., help="A result set folder written by 'lesion run'.", show_default=False),
    run: str = typer.Option(..., "--run", help="The run id to export (a unique prefix is enough).", show_default=False),
    out: Path = typer.Option(..., "--out", "-o", help="The .npz file to write.", show_default=False),
) -> None:
    """Write a run's trained parameters and running statistics to a .npz file.

    The run is re-executed from the result set's own spec; the file is written only if the
    parameters' hash equals the stored one (exit 2 and nothing written otherwise).

    Examples:

      lesion export results/cold-chain-af23c1abfa5f --run d7126c08adb5b38b-s2 \\
        -o winner.npz
    """
    from runtime.export import export_run

    done = export_run(result, run, out, on_group=lambda g: _err(f"re-executing run {run} "
                                                                f"at lane width {g.lane_width} ..."))
    note = " (the run became non-finite: these are its last finite parameters)" if done.status != "ok" else ""
    _err(f"parameter hash {done.param_hash[:16]}… matches the stored one; {done.arrays} arrays written{note}")
    typer.echo(str(done.path))


class FailOn(str, Enum):
    worse = "worse"
    never = "never"


class Correction(str, Enum):
    holm = "holm"
    bh = "bh"


@app.command(cls=_Command)
def diff(
    a: Path = typer.Argument(..., metavar="A", help="Result set A (the reference).", show_default=False),
    b: Path = typer.Argument(None, metavar="B", help="Result set B (the change). Omit to compare within A.",
                             show_default=False),
    baseline: str = typer.Option(None, "--baseline", metavar="VARIANT",
                                 help="Compare every variant of A with this variant of A: its label, a short label "
                                      "('kind=batch, 0.0'), its index, or 'base' (the base configuration)."),
    axis: str = typer.Option(None, "--axis", metavar="KEY", help="Grid: ask only about this axis (its effect at each "
                             "level of the others, on average, and its interaction with each other axis)."),
    metric: list[str] = typer.Option(None, "--metric", "-m", metavar="METRIC",
                                     help="Metric(s) to compare (default: the study's)."),
    margin: float = typer.Option(None, "--margin", metavar="D", help="Practical margin in the metric's units: "
                                 "differences inside ±D do not matter (default: the spec's study.margin)."),
    correction: Correction = typer.Option(Correction.holm, "--correction",
                                          help="Multiple-comparison adjustment: holm (family-wise) or bh (false discovery rate)."),
    alpha: float = typer.Option(0.05, "--alpha", min=1e-6, max=0.5, metavar="P", help="Significance level of adjusted p-values."),
    format: Output = typer.Option(Output.table, "--format", "-f", help="table, json, csv or markdown."),
    fail_on: FailOn = typer.Option(FailOn.never, "--fail-on", help="'worse': exit 1 if any adjusted comparison is worse."),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """Decide, per question, whether a change is better, worse, equivalent within a margin, or not yet known.

    Two result sets: B − A per matched variant. One result set: the comparisons its design asks
    for (a grid: each axis at every level of the others, on average, and the interaction of two
    axes; otherwise each variant vs base), or every variant vs --baseline. Each question is one
    family: p-values adjusted together, intervals at the level the adjusted verdicts use.

    Examples:

      lesion diff results/cold-chain-af23c1abfa5f --axis normalization.kind \\
        --margin 0.01

      lesion diff results/cold-chain-af23c1abfa5f results/cold-chain-<other hash>

      lesion diff results/cold-chain-af23c1abfa5f --baseline base

      lesion diff A B --format markdown --fail-on worse
    """
    from runtime.diff import DIFF_COLUMNS
    from runtime.formats import Fit, render

    if b is not None and (baseline is not None or axis is not None):
        raise UsageError("--baseline and --axis compare within one result set: give A alone")
    if baseline is not None and axis is not None:
        raise UsageError("give --baseline or --axis, not both")
    report, findings = _decide(a, b, baseline, axis, metric, margin, correction, alpha, None)
    scope = f"B − A ({b.name} vs {a.name})" if b is not None else a.name
    method = "Holm" if correction is Correction.holm else "Benjamini–Hochberg"
    if format is Output.json:
        typer.echo(render(report.rows, DIFF_COLUMNS + ["reason"], "json", title=f"{scope}, p adjusted by {method}",
                          extra={**report.extra(), "findings": findings}))
    else:
        if format in (Output.table, Output.markdown) and b is not None:
            lines = ["spec: identical studies (a reproducibility check)"] if report.same_study else \
                ["spec changes (A → B):"] + [f"  {printable(c.render())}" for c in report.changes]
            if report.only_a:
                lines.append("only in A: " + "; ".join(map(printable, report.only_a)))
            if report.only_b:
                lines.append("only in B: " + "; ".join(map(printable, report.only_b)))
            typer.echo("\n".join(lines if format is Output.table else [f"    {x}" if x.startswith("  ") else x for x in lines]) + "\n")
        if format is Output.csv:
            typer.echo(render(report.rows, DIFF_COLUMNS, "csv"))
        else:
            for q in report.questions:
                family = [r for r in report.rows if r["question"] == q]
                rows, columns = _compact_diff(family, baseline is not None or b is None) if format is Output.table \
                    else (family, DIFF_COLUMNS)
                # With one metric its name is in every row; with several it tells the rows apart.
                many = len({r["metric"] for r in family}) > 1
                fit = Fit(keep=("variant", "B − A", "CI", "p adj", "verdict", "seeds needed")
                          + (("metric",) if many else ()),
                          drop=("test", "p", "n", "A", "B", "p flip", "B − A in sd", "detectable")
                          + (() if many else ("metric",)),
                          wrap=("variant", "CI", "verdict", "P(B better)"))
                typer.echo(render(rows, columns, format.value, title=_family_title(q, family, method, report.sequential),
                                  width=_terminal_width(wide), fit=fit) + "\n")
        if format is Output.table:
            untested = [r for r in report.rows if r["verdict"] == "no test possible"]
            if untested:
                _echo_fitted(f"{len(untested)} row(s): {untested[0]['reason']}", wide)
            for note in report.notes:
                _echo_fitted(f"note: {note}", wide)
    if fail_on is FailOn.worse and not report.rows:
        _err("no variant matched: the gate compared nothing, so it does not pass")
        raise typer.Exit(1)
    if fail_on is FailOn.worse and report.worse:
        raise typer.Exit(1)


def _decide(a, b, baseline, axis, metric, margin, correction, alpha, power):
    """The report the arguments ask for, and the result sets' audit findings (printed on stderr)."""
    from runtime.audit import audit
    from runtime.diff import diff_baseline, diff_design, diff_result_sets
    from runtime.stats import POWER
    from runtime.store import open_result_set

    rs_a = open_result_set(a)
    kw = dict(metrics=metric or None, correction=correction.value, alpha=alpha, margin=margin,
              power=POWER if power is None else power)
    if b is not None:
        rs_b = open_result_set(b)
        findings = _print_audit(audit(rs_a), "A: ") + _print_audit(audit(rs_b), "B: ")
        return diff_result_sets(rs_a, rs_b, **kw), findings
    findings = _print_audit(audit(rs_a))
    if baseline is not None:
        return diff_baseline(rs_a, _baseline(rs_a, baseline), **kw), findings
    return diff_design(rs_a, axis=axis, **kw), findings


def _baseline(rs, given: str) -> str:
    """The full label of the variant ``--baseline`` names; an older form of it is read with a
    notice on stderr saying today's label."""
    from runtime.diff import baseline_label

    label, notice = baseline_label(rs, given)
    if notice:
        _err(f"notice: {notice}")
    return label


def _family_title(question: str, rows: list[dict], method: str, sequential: bool = False) -> str:
    """The question, the size of its family, the adjustment and the level of its intervals."""
    level = next((r["ci_level"] for r in rows if r.get("ci_level") is not None), None)
    text = f"{question} — {len(rows)} comparison{'s' if len(rows) != 1 else ''}, p adjusted by {method}"
    if sequential and level is not None:
        text = (f"{question} — {len(rows)} comparison{'s' if len(rows) != 1 else ''}, seeds chosen sequentially: "
                "each interval is the repeated confidence interval of the look that settled it")
    elif level is not None:
        text += f"; intervals at {100 * level:.4g} %, the level the verdicts use"
    margins = {r.get("margin") for r in rows} - {None}
    if margins:
        text += f"; margin ±{', ±'.join(map(str, sorted(margins)))}"
    return text


def _compact_diff(rows: list[dict], within: bool) -> tuple[list[dict], list[str]]:
    """The diff for a terminal: one variant column, n as 'A/B', the interval in one cell; seeds needed
    only where the verdict is still open."""
    from runtime.formats import fmt_number

    out = []
    for r in rows:
        need = r.get("seeds_needed")
        same = r["variant_a"] == r["variant_b"]
        variant = r["contrast"] or (r["variant_b"] if within or same else f"{r['variant_a']} → {r['variant_b']}")
        ci = "" if r.get("ci_low") is None else f"[{fmt_number(r['ci_low'])}, {fmt_number(r['ci_high'])}]"
        improve = "" if r.get("p_improve") is None else \
            f"{fmt_number(r['p_improve'])} [{fmt_number(r['p_improve_low'])}, {fmt_number(r['p_improve_high'])}]"
        open_ = r["verdict"] in ("inconclusive", "no detectable change")
        out.append({"variant": variant, "metric": r["metric"], "test": r["test"], "n": f"{r['n_a']}/{r['n_b']}",
                    "A": r.get("mean_a"), "B": r.get("mean_b"), "B − A": r.get("diff"), "CI": ci,
                    "p": r["p"], "p adj": r["p_adjusted"], "p flip": r.get("p_sign_flip"),
                    "P(B better)": improve, "B − A in sd": r.get("effect_sd"), "detectable": r.get("detectable"),
                    # no margin, no count: an empty column, left out of the table
                    "seeds needed": need if open_ and need is not None and math.isfinite(need) else None,
                    "verdict": r["verdict"]})
    return out, ["variant", "metric", "test", "n", "A", "B", "B − A", "CI", "p", "p adj", "p flip", "P(B better)",
                 "B − A in sd", "detectable", "seeds needed", "verdict"]


@app.command(cls=_Command)
def seeds(
    pilot: Path = typer.Argument(..., metavar="PILOT", help="A pilot result set written by 'lesion run'.", show_default=False),
    margin: float = typer.Option(None, "--margin", help="Practical margin in the metric's units "
                                 "(default: the spec's study.margin)."),
    axis: str = typer.Option(None, "--axis", help="Grid: plan only the comparisons of this axis."),
    baseline: str = typer.Option(None, "--baseline", help="Plan every variant vs this variant."),
    metric: str = typer.Option(None, "--metric", "-m", help="Metric to plan for (default: the study's)."),
    power: float = typer.Option(0.8, "--power", min=0.5, max=0.999, help="Chance of reaching a decision."),
    correction: Correction = typer.Option(Correction.holm, "--correction", help="holm or bh, as in diff."),
    alpha: float = typer.Option(0.05, "--alpha", min=1e-6, max=0.5, help="Significance level, as in diff."),
    format: Output = typer.Option(Output.table, "--format", "-f", help="table, json, csv or markdown."),
) -> None:
    """Plan seeds from a pilot: per comparison, the smallest difference its seeds detect and the
    seeds a decision at the margin needs (noncentral t, from the pilot's paired sd).

    Examples:

      lesion seeds results/cold-chain-af23c1abfa5f --axis normalization.kind \\
        --margin 0.005
    """
    from runtime.diff import SEEDS_COLUMNS
    from runtime.formats import render

    if baseline is not None and axis is not None:
        raise UsageError("give --baseline or --axis, not both")
    report, _ = _decide(pilot, None, baseline, axis, [metric] if metric else None, margin, correction, alpha, power)
    rows = [r for r in report.rows if r["test"] == "paired"]
    if not any(r["margin"] is not None for r in rows):
        raise UsageError("seeds needs a practical margin: give --margin D (in the metric's units) or set study.margin")
    title = (f"{pilot.name}: seeds for a decision at power {power:g} (a difference of ±margin called better/worse, "
             "none called equivalent), from the pilot's paired sd")
    typer.echo(render(rows, SEEDS_COLUMNS, format.value, title=title))


class PlotKind(str, Enum):
    curves = "curves"
    arms = "arms"
    grid = "grid"
    budget = "budget"


@app.command(cls=_Command)
def plot(
    result: Path = typer.Argument(..., metavar="RESULT", help="A result set folder written by 'lesion run'.", show_default=False),
    out: Path = typer.Option(None, "--out", "-o", metavar="FILE", help="Picture to write, .png or .svg "
                             "(default: <result set>/plots/<kind>.png)."),
    kind: PlotKind = typer.Option(PlotKind.curves, "--kind", "-k",
                                  help="curves: per-epoch means; arms: final values per variant; "
                                       "grid: heat map of a two-axis grid; budget: expected best validation "
                                       "score vs runs tried, per arm of a tuned study."),
    metric: list[str] = typer.Option(None, "--metric", "-m", metavar="METRIC", help="Metric(s) to draw (default: the study's; "
                                     "curves also draw train and val divergence)."),
    baseline: str = typer.Option(None, "--baseline", metavar="LABEL", help="arms: the variant to mark as the baseline "
                                 "(default: the one labelled 'base', if any)."),
    against: Path = typer.Option(None, "--against", metavar="RESULT", help="Draw the diff from RESULT (A) to this result set (B)."),
    margin: float = typer.Option(None, "--margin", metavar="D", help="With --against: the practical margin, as in diff."),
) -> None:
    """Draw a result set as a picture (PNG or SVG) and print the written path.

    Examples:

      lesion plot results/cold-chain-af23c1abfa5f

      lesion plot results/cold-chain-af23c1abfa5f --kind grid -o grid.svg

      lesion plot results/kiln-drift-4f765a63c96a --kind arms \\
        --metric val_rmse --metric val_divergence

      lesion plot results/A --against results/B
    """
    from runtime.plot import default_path, plot_diff, plot as draw, save_figure  # imports matplotlib
    from runtime.store import open_result_set

    if against is not None and baseline is not None:
        raise UsageError("--baseline marks an arm of one result set; it does not apply with --against")
    if against is None and margin is not None:
        raise UsageError("--margin applies to a diff: give --against B")
    rs = open_result_set(result)
    if against is not None:
        fig = plot_diff(rs, open_result_set(against), metrics=metric or None, margin=margin)
        target = out or rs.path / "plots" / f"diff-{Path(against).resolve().name}.png"
    else:
        # Named as diff names it, once the kind is known to take one (plot refuses it otherwise).
        mark = _baseline(rs, baseline) if baseline is not None and kind.value == "arms" else baseline
        fig = draw(rs, kind.value, metrics=metric or None, baseline=mark)
        target = out or default_path(rs, kind.value)
    typer.echo(str(save_figure(fig, target)))


@app.command(cls=_Command)
def report(
    result: Path = typer.Argument(..., help="A result set folder written by 'lesion run'.", show_default=False),
    out: Path = typer.Option(None, "--out", "-o", help="The HTML file to write (default: <result set>/report.html)."),
    baseline: str = typer.Option(None, "--baseline", help="The variant the verdicts compare against "
                                 "(default: 'base', else the first variant)."),
) -> None:
    """Write one self-contained HTML page about a result set: question, summary, verdicts,
    pictures, spec, environment and how to replay; print its path.

    Examples:

      lesion report results/cold-chain-af23c1abfa5f

      lesion report results/cold-chain-af23c1abfa5f --baseline "none · 0.0" \\
        -o review.html
    """
    from runtime.report import render_report  # imports matplotlib
    from runtime.store import open_result_set

    rs = open_result_set(result)
    target = out or rs.path / "report.html"
    if target.suffix.lower() not in (".html", ".htm"):
        raise UsageError(f"-o {target}: expected a file ending in .html")
    page = render_report(rs, baseline and _baseline(rs, baseline))
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(page, encoding="utf-8")
    except OSError as err:
        raise UsageError(f"-o {target}: cannot write ({err.strerror or err})") from None
    typer.echo(str(target))


def main() -> None:
    """The command line, after :func:`runtime.start.main` (the console script) or ``python -m``.

    Standard output that cannot take what a command prints (closed with ``>&-``, a full disk,
    ``>/dev/full``) is a one-line error and exit 2, never a traceback nor output silently
    dropped; a pipe closed by its reader (``| head``) keeps click's quiet exit 1."""
    if sys.stdout is None:  # descriptor 1 closed at start: refuse before any work is done
        _err("lesion: standard output is closed; redirect it instead (e.g. >/dev/null)")
        sys.exit(2)
    try:
        app()
    except SystemExit as done:
        _flush_stdout()
        raise done from None
    except OSError as err:
        # lesion's own files turn their OSErrors into user errors naming the file; one without a
        # file name and of this kind is the console stream refusing bytes.
        if err.filename is not None or err.errno not in _STREAM_ERRORS:
            raise
        _quiet_stdout()
        _err(f"lesion: cannot write to standard output ({err.strerror or err})")
        sys.exit(2)


_STREAM_ERRORS = (errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EBADF, errno.EIO)


def _quiet_stdout() -> None:
    """Point descriptor 1 at /dev/null, so the interpreter's own flush at exit does not fail
    again with a traceback."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


def _flush_stdout() -> None:
    try:
        sys.stdout.flush()
    except OSError as err:
        if err.errno not in _STREAM_ERRORS:
            raise
        _quiet_stdout()
        _err(f"lesion: cannot write to standard output ({err.strerror or err})")
        sys.exit(2)


if __name__ == "__main__":
    sys.exit(main())
