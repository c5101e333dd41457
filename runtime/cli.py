"""The ``lesion`` command line: one function per command; each loads, calls and prints.

Contract:

- a known user error (:data:`USER_ERRORS`, e.g. a :class:`SpecError`) raised by any command is
  printed to stderr, one problem per line (``FILE:LINE: key.path: what is wrong``), and the exit
  code is 2, without a traceback; anything else is a bug and surfaces as one;
- output meant for programs (``--format json``) goes to stdout alone;
- nothing here imports jax at import time: ``check`` and ``schema`` must stay fast, and commands
  that need it import it inside their function.
"""

from __future__ import annotations

import json
import sys
from enum import Enum
from pathlib import Path

import typer
from typer.core import TyperGroup

from compiler.errors import SpecError
from runtime.store import ResultSetError

__all__ = ["app", "main", "USER_ERRORS"]


class UsageError(Exception):
    """Arguments that do not fit together (a one-line message, exit 2)."""


# Errors that mean "the input is wrong", not "lesion is wrong" (plus compiler.data.DataError,
# see _loaded_user_errors).
USER_ERRORS: tuple[type[Exception], ...] = (SpecError, ResultSetError, UsageError)


class _Group(TyperGroup):
    """Turns a user error raised by any command into its printed problems and exit code 2."""

    def invoke(self, ctx: typer.Context):
        try:
            return super().invoke(ctx)
        except Exception as err:
            if not isinstance(err, USER_ERRORS + _loaded_user_errors()):
                raise
            for line in str(err).splitlines() or [type(err).__name__]:
                typer.echo(line, err=True)
            raise typer.Exit(2) from None


app = typer.Typer(
    cls=_Group,
    name="lesion",
    help="Declarative ablation studies of neural-network training choices, compiled to JAX.\n\n"
         "A study is one TOML file: a base configuration and an [ablation] that derives variants from it.\n\n"
         "Examples:\n\n"
         "  lesion check specs/cold-chain.toml\n\n"
         "  lesion run specs/cold-chain.toml            # prints the result set's path last\n\n"
         "  lesion show results/cold-chain-<hash>\n\n"
         "  lesion replay results/cold-chain-<hash>\n\n"
         "  lesion diff results/A results/B --fail-on worse\n\n"
         "  lesion schema > lesion.schema.json",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
    pretty_exceptions_enable=False,
)


def _loaded_user_errors() -> tuple[type[Exception], ...]:
    # compiler.data, runtime.cluster, runtime.guard and runtime.execute are only in sys.modules
    # when a command needed data, a cluster, a resource estimate or the compile cache; then their
    # errors count too.
    found = [getattr(sys.modules[name], error) for name, error in
             (("compiler.data", "DataError"), ("runtime.cluster", "ClusterError"),
              ("runtime.guard", "ResourceError"), ("runtime.execute", "CacheError")) if name in sys.modules]
    return tuple(found)


class Format(str, Enum):
    table = "table"
    json = "json"


class Output(str, Enum):
    table = "table"
    json = "json"
    csv = "csv"
    markdown = "markdown"


@app.command()
def check(
    spec: Path = typer.Argument(..., help="The study's TOML spec file.", show_default=False),
    format: Format = typer.Option(Format.table, "--format", "-f", help="table for people, json for programs."),
) -> None:
    """Validate a spec and list the variants and runs it expands to; exit 2 listing every problem.

    Examples:

      lesion check specs/cold-chain.toml

      lesion check specs/cold-chain.toml --format json
    """
    from compiler.loader import load_study

    study = load_study(spec)
    if format is Format.json:
        typer.echo(json.dumps(_check_report(study), indent=2, ensure_ascii=False))
        return
    _print_check_table(study)


def _check_report(study) -> dict:
    return {
        "spec": study.path,
        "study": study.spec.study.name,
        "study_hash": study.study_hash,
        "result_set": study.result_set,
        "seeds": study.seeds,
        "structures": len({v.structure for v in study.variants}),
        "runs": study.runs,
        "variants": [
            {"label": v.label, "changes": v.changes, "variant_hash": v.hash, "structure": v.structure,
             "seeds": study.seeds}
            for v in study.variants
        ],
    }


def _print_check_table(study) -> None:
    from rich.console import Console
    from rich.table import Table

    from compiler.expand import format_value

    structures = sorted({v.structure for v in study.variants}, key=[v.structure for v in study.variants].index)
    typer.echo(f"study       {study.spec.study.name}")
    typer.echo(f"study hash  {study.study_hash}")
    typer.echo(f"result set  {study.result_set}")
    typer.echo(f"{len(study.variants)} variants × {len(study.seeds)} seeds = {study.runs} runs, "
               f"compiled as {len(structures)} program{'s' if len(structures) != 1 else ''}")
    table = Table(show_edge=False, header_style="bold")
    for name in ("#", "label", "changes", "variant hash", "seeds", "structure"):
        table.add_column(name, overflow="fold")
    seeds = _seeds_text(study.seeds)
    for v in study.variants:
        changes = ", ".join(f"{k}={format_value(x)}" for k, x in v.changes.items()) or "(nothing: the base)"
        if changes == v.label:
            changes = "(as the label says)"
        table.add_row(str(v.index), v.label, changes, v.hash[:12], seeds, v.structure)
    Console(markup=False, highlight=False, emoji=False, width=_terminal_width()).print(table)


def _terminal_width() -> int:
    # Piped output has no width to respect; keep each variant on one line for grep and diff.
    import shutil
    return shutil.get_terminal_size((100, 24)).columns if sys.stdout.isatty() else 200


def _seeds_text(seeds: list[int]) -> str:
    if len(seeds) > 3 and seeds == list(range(seeds[0], seeds[0] + len(seeds))):
        return f"{seeds[0]}..{seeds[-1]}"
    return ",".join(map(str, seeds))


@app.command()
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


@app.command()
def run(
    spec: Path = typer.Argument(..., help="The study's TOML spec file.", show_default=False),
    out: Path = typer.Option(Path("results"), "--out", "-o", help="Folder that receives the result set."),
    lanes: int = typer.Option(None, "--lanes", min=1, max=4096,
                              help="Runs per compiled program call (lane width); default: chosen per structure."),
    fresh: bool = typer.Option(False, "--fresh", help="Recompute every run, even those already stored."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars or summary on stderr."),
    cluster: str = typer.Option(None, "--cluster",
                                help="Run the groups on a Dask scheduler (tcp://HOST:PORT) or on N local "
                                     "worker processes (local:N); results are written here."),
) -> None:
    """Run every variant × seed of a study and store the result set; print its path last.

    Runs already stored with the same run id and the same numerics environment are kept, so
    re-running an interrupted study finishes only what is missing.

    Examples:

      lesion run specs/cold-chain.toml

      lesion run specs/cold-chain.toml --out /tmp/results --lanes 16 --quiet

      lesion run specs/cold-chain.toml --cluster local:4
    """
    from compiler.loader import load_study

    study = load_study(spec)
    from runtime.runner import run_study  # imports jax: after the spec is known to be good

    progress = None if quiet else _RunProgress(study)
    executor = None
    if cluster is not None:
        from runtime.cluster import DaskExecutor
        executor = DaskExecutor(cluster, on_warning=lambda text: _err(f"warning: {text}"))
    try:
        with executor or _nothing(), progress or _nothing():
            report = run_study(study, out, lanes=lanes, fresh=fresh, progress=progress, executor=executor,
                               on_wait=lambda: _err("waiting: another 'lesion run' is writing this result set"))
    except KeyboardInterrupt:
        _err(f"interrupted: finished groups are stored in {out / study.result_set}; "
             f"run the same command again to compute only what is missing")
        raise typer.Exit(130) from None
    if not quiet:
        _err(f"{report.planned} runs: {report.computed} computed, {report.reused} already stored; "
             f"{report.diverged} diverged; {report.groups} groups, "
             f"compile {report.compile_seconds:.1f} s, run {report.run_seconds:.1f} s")
        for w in report.warnings:
            _err(f"warning: {w}")
    typer.echo(str(report.path))


class _nothing:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


class _RunProgress:
    """A rich progress bar per compile group on stderr: runs, epochs, elapsed and remaining."""

    def __init__(self, study):
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, \
            TimeRemainingColumn

        self.progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                 TextColumn("epochs"), TimeElapsedColumn(), TimeRemainingColumn(),
                                 console=Console(stderr=True), transient=False)
        self.task = None
        self.done = 0
        self.total = 0
        self.groups = 0
        self.index = 0

    def __enter__(self):
        self.progress.__enter__()
        return self

    def __exit__(self, *exc):
        return self.progress.__exit__(*exc)

    def __call__(self, event, **info):
        if event == "plan":
            self.total, self.groups = info["runs"], info["groups"]
            if info["runs"] == 0:
                self.progress.console.print(f"all {info['planned']} runs already stored")
            elif info.get("estimate") is not None:
                self.progress.console.print(f"{info['runs']} runs to compute: needs {info['estimate'].describe()}")
        elif event == "group":
            g = info["group"]
            self.index += 1
            self.task = self.progress.add_task(
                f"group {self.index}/{self.groups} ({len(g.runs)} runs, width {g.lane_width})",
                total=g.runs[0].variant.spec.training.epochs)
        elif event == "epoch":
            self.progress.update(self.task, completed=info["done"])
        elif event == "stored":
            self.done += len(info["group"].runs)


@app.command()
def show(
    result: Path = typer.Argument(..., help="A result set folder written by 'lesion run'.", show_default=False),
    format: Output = typer.Option(Output.table, "--format", "-f", help="table, json, csv or markdown."),
    curves: bool = typer.Option(False, "--curves", help="Per-epoch means per variant instead of the summary."),
    metric: list[str] = typer.Option(None, "--metric", "-m", help="Metric(s) to show (default: the study's)."),
) -> None:
    """Summarize a result set per variant: runs ok/diverged, mean ± sd and 95 % CI across seeds.

    Examples:

      lesion show results/cold-chain-7da471c81b78

      lesion show results/cold-chain-7da471c81b78 --curves --format csv
    """
    from runtime.audit import audit
    from runtime.formats import render
    from runtime.show import SUMMARY_COLUMNS, curve_rows, summary_rows
    from runtime.store import open_result_set

    rs = open_result_set(result)
    findings = _print_audit(audit(rs))
    name = rs.tree["study"]["name"]
    try:
        if curves:
            rows, columns = curve_rows(rs, metric or None)
            title = f"{name} ({rs.study_hash[:12]}): per-epoch means over ok runs"
        else:
            if metric and len(metric) > 1:
                raise UsageError("show summarizes one metric at a time (give --metric once)")
            m = metric[0] if metric else rs.headline
            rows, columns = summary_rows(rs, m), SUMMARY_COLUMNS
            title = f"{name} ({rs.study_hash[:12]}): final {m} across seeds (mean, sd, 95% CI)"
    except ValueError as err:
        raise UsageError(str(err)) from None
    typer.echo(render(rows, columns, format.value, title=title, extra={"findings": findings}))


def _print_audit(check, side: str = "") -> list[str]:
    """A result set's findings on stderr, so stdout stays the report (and valid JSON); returned
    for the JSON report too."""
    lines = [f"warning: {side}{x}" for x in check.warnings()] + [f"note: {side}{x}" for x in check.notes()]
    for line in lines:
        _err(line)
    return lines


@app.command()
def replay(
    result: Path = typer.Argument(..., help="A result set folder written by 'lesion run'.", show_default=False),
    run: str = typer.Option(None, "--run", help="Replay this run id (a prefix replays every run it starts)."),
    variant: str = typer.Option(None, "--variant", help="Replay the runs of this variant label."),
    format: Format = typer.Option(Format.table, "--format", "-f", help="table for people, json for programs."),
) -> None:
    """Re-execute stored runs (all of them by default) from the result set's own spec and compare
    every cell the re-execution decides, bit for bit.

    Exit 0 when every replayed run is identical, 1 when any differs or is missing or the tables
    were edited after writing, 2 when the result set is refused (edited spec, duplicated runs,
    changed data file) or the arguments are wrong.

    Examples:

      lesion replay results/cold-chain-7da471c81b78

      lesion replay results/cold-chain-7da471c81b78 --variant "normalization.kind=batch, regularization.dropout.rate=0.15"
    """
    if run is not None and variant is not None:
        raise UsageError("give --run or --variant, not both")
    from runtime.formats import render
    from runtime.replay import replay as do_replay

    report = do_replay(result, run=run, variant=variant,
                       on_group=None if format is Format.json else
                       (lambda g: _err(f"replaying {len(g.runs)} run(s) at lane width {g.lane_width} ...")))
    rows = [r.as_dict() for r in report.rows]
    columns = ["run_id", "variant", "seed", "lane_width", "verdict", "first_epoch", "first_metric",
               "max_abs", "max_rel", "digest", "cells"]
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
        typer.echo(render([{**r, "cells": ", ".join(r["cells"])} for r in rows], columns, "table", title="replay"))
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


class FailOn(str, Enum):
    worse = "worse"
    never = "never"


class Correction(str, Enum):
    holm = "holm"
    bh = "bh"


@app.command()
def diff(
    a: Path = typer.Argument(..., help="Result set A (the reference).", show_default=False),
    b: Path = typer.Argument(None, help="Result set B (the change). Omit with --baseline.", show_default=False),
    baseline: str = typer.Option(None, "--baseline", help="Compare every variant of A with this variant of A."),
    metric: list[str] = typer.Option(None, "--metric", "-m", help="Metric(s) to compare (default: the study's)."),
    correction: Correction = typer.Option(Correction.holm, "--correction",
                                          help="Multiple-comparison adjustment: holm (family-wise) or bh (false discovery rate)."),
    alpha: float = typer.Option(0.05, "--alpha", min=1e-6, max=0.5, help="Significance level of adjusted p-values."),
    format: Output = typer.Option(Output.table, "--format", "-f", help="table, json, csv or markdown."),
    fail_on: FailOn = typer.Option(FailOn.never, "--fail-on", help="'worse': exit 1 if any adjusted comparison is worse."),
) -> None:
    """Compare two result sets (or every variant with a baseline) beyond seed noise.

    Per matched variant and metric: n, means, B − A with a 95 % CI, p-value (paired t over common
    seeds, else Welch), adjusted p-value and a verdict: better, worse, no detectable change.

    Examples:

      lesion diff results/cold-chain-7da471c81b78 results/cold-chain-0c2f5a9e1d44

      lesion diff results/cold-chain-7da471c81b78 --baseline "normalization.kind=none, regularization.dropout.rate=0.0"

      lesion diff A B --format markdown --fail-on worse
    """
    from runtime.audit import audit
    from runtime.diff import DIFF_COLUMNS, diff_baseline, diff_result_sets
    from runtime.formats import render
    from runtime.store import open_result_set

    if (b is None) == (baseline is None):
        raise UsageError("give two result sets (lesion diff A B), or one with --baseline LABEL")
    rs_a = open_result_set(a)
    if baseline is not None:
        report = diff_baseline(rs_a, baseline, metrics=metric or None, correction=correction.value, alpha=alpha)
        title = f"each variant vs baseline '{baseline}'"
        findings = _print_audit(audit(rs_a))
    else:
        rs_b = open_result_set(b)
        report = diff_result_sets(rs_a, rs_b, metrics=metric or None, correction=correction.value, alpha=alpha)
        title = f"B − A ({b.name} vs {a.name})"
        findings = _print_audit(audit(rs_a), "A: ") + _print_audit(audit(rs_b), "B: ")
    title += f", p adjusted by {'Holm' if correction is Correction.holm else 'Benjamini–Hochberg'}"
    if format is Output.json:
        typer.echo(render(report.rows, DIFF_COLUMNS + ["reason"], "json", title=title,
                          extra={**report.extra(), "findings": findings}))
    else:
        if format in (Output.table, Output.markdown) and b is not None:
            lines = ["spec: identical studies (a reproducibility check)"] if report.same_study else \
                ["spec changes (A → B):"] + [f"  {c.render()}" for c in report.changes]
            if report.only_a:
                lines.append("only in A: " + "; ".join(report.only_a))
            if report.only_b:
                lines.append("only in B: " + "; ".join(report.only_b))
            typer.echo("\n".join(lines if format is Output.table else [f"    {x}" if x.startswith("  ") else x for x in lines]) + "\n")
        if format is Output.table:
            rows, columns = _compact_diff(report.rows, baseline is not None)
        else:
            rows, columns = report.rows, DIFF_COLUMNS
        typer.echo(render(rows, columns, format.value, title=title))
        untested = [r for r in report.rows if r["verdict"] == "no test possible"]
        if untested and format is Output.table:
            typer.echo(f"{len(untested)} row(s): {untested[0]['reason']}")
    if fail_on is FailOn.worse and not report.rows:
        _err("no variant matched: the gate compared nothing, so it does not pass")
        raise typer.Exit(1)
    if fail_on is FailOn.worse and report.worse:
        raise typer.Exit(1)


def _compact_diff(rows: list[dict], baseline: bool) -> tuple[list[dict], list[str]]:
    """The diff for a terminal: one variant column, n as 'A/B', the interval in one cell."""
    from runtime.formats import fmt_number

    out = []
    for r in rows:
        same = r["variant_a"] == r["variant_b"]
        variant = r["variant_b"] if baseline or same else f"{r['variant_a']} → {r['variant_b']}"
        ci = "" if r["ci_low"] is None else f"[{fmt_number(r['ci_low'])}, {fmt_number(r['ci_high'])}]"
        out.append({"variant": variant, "metric": r["metric"], "test": r["test"], "n": f"{r['n_a']}/{r['n_b']}",
                    "A": r["mean_a"], "B": r["mean_b"], "B − A": r["diff"], "95% CI": ci,
                    "p": r["p"], "p adj": r["p_adjusted"], "verdict": r["verdict"]})
    return out, ["variant", "metric", "test", "n", "A", "B", "B − A", "95% CI", "p", "p adj", "verdict"]


class PlotKind(str, Enum):
    curves = "curves"
    arms = "arms"
    grid = "grid"


@app.command()
def plot(
    result: Path = typer.Argument(..., help="A result set folder written by 'lesion run'.", show_default=False),
    out: Path = typer.Option(None, "--out", "-o", help="Picture to write, .png or .svg "
                             "(default: <result set>/plots/<kind>.png)."),
    kind: PlotKind = typer.Option(PlotKind.curves, "--kind", "-k",
                                  help="curves: per-epoch means; arms: final values per variant; "
                                       "grid: heat map of a two-axis grid."),
    metric: list[str] = typer.Option(None, "--metric", "-m", help="Metric(s) to draw (default: the study's; "
                                     "curves also draw train and val divergence)."),
    baseline: str = typer.Option(None, "--baseline", help="arms: the variant to mark as the baseline "
                                 "(default: the one labelled 'base', if any)."),
    against: Path = typer.Option(None, "--against", help="Draw the diff from RESULT (A) to this result set (B)."),
) -> None:
    """Draw a result set as a picture (PNG or SVG) and print the written path.

    Examples:

      lesion plot results/cold-chain-7da471c81b78

      lesion plot results/cold-chain-7da471c81b78 --kind grid -o grid.svg

      lesion plot results/kiln-drift-4f765a63c96a --kind arms --metric val_rmse --metric val_divergence

      lesion plot results/A --against results/B
    """
    from runtime.plot import PlotError, default_path, plot_diff, plot as draw, save_figure  # imports matplotlib
    from runtime.store import open_result_set

    rs = open_result_set(result)
    try:
        if against is not None:
            if baseline is not None:
                raise UsageError("--baseline marks an arm of one result set; it does not apply with --against")
            fig = plot_diff(rs, open_result_set(against), metrics=metric or None)
            target = out or rs.path / "plots" / f"diff-{Path(against).resolve().name}.png"
        else:
            fig = draw(rs, kind.value, metrics=metric or None, baseline=baseline)
            target = out or default_path(rs, kind.value)
        typer.echo(str(save_figure(fig, target)))
    except PlotError as err:
        raise UsageError(str(err)) from None


def main() -> None:
    """Console-script entry point (``lesion = "runtime.cli:main"``)."""
    app()


if __name__ == "__main__":
    sys.exit(main())
