"""One base for every error that means "the input is wrong": the CLI catches it, and only it."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

import compiler.loader
from compiler.data import DataError
from compiler.errors import SpecError, UserError
from runtime.cli import UsageError, app
from runtime.cluster import ClusterError
from runtime.environment import SettingError
from runtime.guard import ResourceError
from runtime.plot import PlotError
from runtime.programs import CacheError
from runtime.store import ResultSetError


@pytest.mark.parametrize("error", [SpecError, ResultSetError, DataError, ClusterError, ResourceError, CacheError,
                                   PlotError, SettingError, UsageError])
def test_every_user_error_derives_from_the_one_base(error):
    assert issubclass(error, UserError)


class _NewKind(UserError):
    """A user error no list names: the CLI must still treat it as one."""


def test_any_user_error_is_its_lines_and_exit_2(monkeypatch, tmp_path):
    def refuse(path):
        raise _NewKind("spec.toml:3: first problem\nspec.toml:4: second problem")

    monkeypatch.setattr(compiler.loader, "load_study", refuse)
    out = CliRunner().invoke(app, ["check", str(tmp_path / "spec.toml")])
    assert out.exit_code == 2
    assert out.stderr.splitlines() == ["spec.toml:3: first problem", "spec.toml:4: second problem"]
    assert "Traceback" not in out.output


def test_anything_else_is_a_bug_and_surfaces(monkeypatch, tmp_path):
    def crash(path):
        raise RuntimeError("a bug")

    monkeypatch.setattr(compiler.loader, "load_study", crash)
    out = CliRunner().invoke(app, ["check", str(tmp_path / "spec.toml")])
    assert isinstance(out.exception, RuntimeError)
