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

__all__ = ["app", "main", "USER_ERRORS"]

# Errors that mean "the input is wrong", not "lesion is wrong".
USER_ERRORS: tuple[type[Exception], ...] = (SpecError,)


class _Group(TyperGroup):
    """Turns a user error raised by any command into its printed problems and exit code 2."""

    def invoke(self, ctx: typer.Context):
        try:
            return super().invoke(ctx)
        except USER_ERRORS as err:
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
         "  lesion schema > lesion.schema.json",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
    pretty_exceptions_enable=False,
)


class Format(str, Enum):
    table = "table"
    json = "json"


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


def main() -> None:
    """Console-script entry point (``lesion = "runtime.cli:main"``)."""
    app()


if __name__ == "__main__":
    sys.exit(main())
