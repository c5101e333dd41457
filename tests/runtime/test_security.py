"""What a spec can make lesion do: pick entries of closed registries, read a table beside it,
write under ``--results``. Never run code, import by name, unpickle, read outside the spec's folder or
write outside ``--results``.

The data path rule (compiler/spec.py, FileData): a path is resolved relative to the spec file's
folder and may not leave it (absolute paths and ``..`` climbing out are refused at check time);
a symbolic link placed inside the folder is followed.
"""

from __future__ import annotations

import hashlib
import re
import subprocess
import sys
import typing
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiler import data, divergences, normalization, optimizers, regularization, spec
from compiler.errors import SpecError
from compiler.loader import load_text
from runtime.programs import cache_dir
from runtime.store import result_dir

ROOT = Path(__file__).parents[2]
BASE = '[study]\nname = "sec"\nseeds = 1\n'


def _problems(text: str) -> list[str]:
    with pytest.raises(SpecError) as err:
        load_text(text, "s.toml")
    return [p.render() for p in err.value.problems]


KIND_KEYS = {
    "divergence.kind": "[divergence]\nkind = {v}\n",
    "normalization.kind": "[normalization]\nkind = {v}\n",
    "optimizer.kind": "[optimizer]\nkind = {v}\n",
    "optimizer.schedule.kind": "[optimizer]\nkind = \"sgd\"\nschedule = {{ kind = {v} }}\n",
    "regularization.dropout.kind": "[regularization]\ndropout = {{ kind = {v} }}\n",
    "data.kind": "[data]\nkind = {v}\n",
    "data.generator": "[data]\ngenerator = {v}\n",
    "model.activation": "[model]\nactivation = {v}\n",
    "model.init": "[model]\ninit = {v}\n",
}


@pytest.mark.parametrize("key", list(KIND_KEYS))
@pytest.mark.parametrize("value", ["os.system", "__import__('os').system('touch {marker}')",
                                   "subprocess:run", "builtins.eval", "numpy.load"])
def test_a_kind_that_names_code_is_just_an_unknown_kind(key, value, tmp_path):
    marker = tmp_path / "ran"
    text = BASE + KIND_KEYS[key].format(v='"' + value.format(marker=marker) + '"')
    problems = _problems(text)
    assert any(p.startswith(f"s.toml:") and f": {key}: " in p for p in problems), problems
    assert not marker.exists()


@pytest.mark.parametrize("registry, family", [
    (divergences.REGISTRY, spec.Divergence), (normalization.REGISTRY, spec.Normalization),
    (optimizers.REGISTRY, spec.Optimizer), (optimizers.SCHEDULES, spec.Schedule),
])
def test_registries_are_closed_dicts_equal_to_the_spec_literals(registry, family):
    # A kind reaches code only as a key of one of these dicts, which hold exactly the kinds the
    # spec language accepts: there is no lookup by module path.
    union = typing.get_args(typing.get_args(family)[0])
    kinds = {typing.get_args(m.model_fields["kind"].annotation)[0] for m in union}
    assert type(registry) is dict and set(registry) == kinds


def test_dropout_and_generator_tables_equal_their_literals():
    dropout = typing.get_args(spec.Dropout.model_fields["kind"].annotation)
    generator = typing.get_args(spec.SyntheticData.model_fields["generator"].annotation)
    assert set(regularization.REGISTRY) == set(dropout) and set(data.GENERATORS) == set(generator)


FORBIDDEN = re.compile(r"\beval\(|\bexec\(|__import__|import_module|pickle\.load|allow_pickle=True|"
                       r"\byaml\b|\bmarshal\b|\bshelve\b|np\.load\((?![^)]*allow_pickle=False)")


@pytest.mark.parametrize("source", sorted([*(ROOT / "compiler").glob("*.py"), *(ROOT / "runtime").glob("*.py")]),
                         ids=lambda p: f"{p.parent.name}/{p.name}")
def test_no_dynamic_code_or_unpickling_in_the_source(source):
    hits = [f"{source.name}:{i}: {line.strip()}" for i, line in enumerate(source.read_text().splitlines(), 1)
            if FORBIDDEN.search(line.split("#")[0]) and (source.name, line.strip()) not in TRUSTED]
    assert not hits, hits


# The one unpickling lesion does: compiled programs from the user's own compile cache (trusted
# local state, documented in the README; JAX's executable serialization is itself a pickle). Its
# folder comes from the environment, never from a spec or a result set.
TRUSTED = {("programs.py", "stored = pickle.load(fh)")}


def _tiny_group():
    from compiler.loader import load_text
    from runtime import environment
    from runtime.plan import plan
    from runtime.runner import datasets_for
    loaded = load_text(BASE, "tiny.toml")
    [group] = plan(loaded.variants, loaded.spec.study.seed_list)
    data = datasets_for([group], ROOT, {})[group.group_id]
    return group, data, frozenset(), environment.capture()


def test_the_compile_cache_folder_cannot_be_chosen_by_a_spec():
    import runtime.programs as programs
    source = (ROOT / "runtime" / "programs.py").read_text()
    assert source.count("pickle.load") == 1
    body = source[source.index("def cache_dir"):source.index("_cache_enabled = False")]
    assert "os.environ" in body and "spec" not in body
    assert programs.program_path(*_tiny_group()).is_relative_to(programs.cache_dir())


class _Payload:
    """Unpickling this creates the marker file: proof that pickle ran."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def test_a_pickled_npz_is_refused_and_never_unpickled(tmp_path):
    marker = tmp_path / "unpickled"
    np.savez(tmp_path / "evil.npz", x=np.array([_Payload(marker)] * 20, dtype=object), y=np.arange(20) % 2)
    assert not marker.exists()
    spec_path = tmp_path / "evil.toml"
    spec_path.write_text(BASE + '[data]\nkind = "file"\npath = "evil.npz"\n[training]\nbatch_size = 4\n')
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec_path), "--results", str(tmp_path / "r"),
                          "--quiet"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert out.returncode == 2 and "Traceback" not in out.stderr, out.stderr
    (line,) = out.stderr.splitlines()
    assert "evil.npz, which cannot be read without pickle" in line
    assert not marker.exists()


@pytest.mark.parametrize("path", ["../outside.csv", "../../etc/passwd.csv", "a/../../b.parquet",
                                  "/etc/passwd.csv", "//server/share/t.npz"])
def test_data_paths_that_leave_the_spec_folder_are_refused(path):
    (problem,) = _problems(BASE + f'[data]\nkind = "file"\npath = "{path}"\n')
    assert problem.startswith("s.toml:6: data.path: ") and "leaves the spec's folder" in problem


@pytest.mark.parametrize("path", ["t.csv", "./t.csv", "sub/t.csv", "sub/../t.csv"])
def test_data_paths_inside_the_spec_folder_are_accepted(path):
    study = load_text(BASE + f'[data]\nkind = "file"\npath = "{path}"\n', "s.toml")
    assert study.spec.data.path == path


@pytest.fixture(scope="module")
def file_run(tmp_path_factory):
    """A study on a data file run from another working directory that has a same-named file."""
    tmp = tmp_path_factory.mktemp("fileref")
    home, elsewhere = tmp / "study", tmp / "elsewhere"
    home.mkdir(), elsewhere.mkdir()
    rng = np.random.default_rng(5)
    for folder, shift in ((home, 0.0), (elsewhere, 5.0)):
        x = rng.normal(size=(64, 3)) + shift
        pq.write_table(pa.table({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2], "y": (x[:, 0] > shift).astype(np.int64)}),
                       folder / "t.parquet")
    spec_path = home / "fileref.toml"
    spec_path.write_text(BASE.replace('"sec"', '"fileref"')
                         + '[data]\nkind = "file"\npath = "t.parquet"\n[model]\nhidden = [4]\n'
                         + '[training]\nepochs = 1\nbatch_size = 8\n')
    before = {p for p in tmp.rglob("*")}
    out = subprocess.run([sys.executable, "-m", "runtime.cli", "run", str(spec_path), "--results", str(tmp / "out"),
                          "--quiet"], cwd=elsewhere, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    return home, elsewhere, tmp, before, Path(out.stdout.strip().splitlines()[-1])


def test_a_relative_data_path_resolves_against_the_spec_folder_not_the_cwd(file_run):
    home, elsewhere, _, _, result = file_run
    hashes = set(pq.read_table(result / "runs.parquet").column("data_hash").to_pylist())
    assert hashes == {hashlib.sha256((home / "t.parquet").read_bytes()).hexdigest()}


def test_a_run_writes_only_under_out(file_run):
    _, _, tmp, before, result = file_run
    new = {p for p in tmp.rglob("*")} - before
    assert new and all(p == tmp / "out" or p.is_relative_to(result) for p in new), sorted(new)


@pytest.mark.parametrize("name", ["../up", "a/b", "/abs", "..", ".", "a\\b", "~", "x" * 65])
def test_a_study_name_cannot_name_a_path(name):
    problems = _problems(f'[study]\nname = "{name.replace(chr(92), chr(92) * 2)}"\n')
    assert any(p.startswith("s.toml:2: study.name: ") for p in problems), problems


@settings(max_examples=200, deadline=None)
@given(name=st.from_regex(spec.Study.model_fields["name"].metadata[0].pattern, fullmatch=True))
def test_every_accepted_name_is_one_folder_directly_under_out(name):
    out = Path("/results/here")
    folder = result_dir(out, name, "ab" * 32)
    assert folder.parent == out and folder.name == f"{name}-{'ab' * 6}"
    assert "/" not in folder.name and folder.name not in (".", "..")


@pytest.mark.parametrize("env, expected", [
    ({"LESION_CACHE_DIR": "/srv/cache/lesion"}, "/srv/cache/lesion"),
    ({"XDG_CACHE_HOME": "/home/u/.xdg"}, "/home/u/.xdg/lesion/xla"),
    ({"HOME": "/home/u"}, "/home/u/.cache/lesion/xla"),
])
def test_the_compile_cache_lives_in_the_users_cache_folder(monkeypatch, env, expected):
    # XDG Base Directory Specification: $XDG_CACHE_HOME, defaulting to $HOME/.cache.
    for var in ("LESION_CACHE_DIR", "XDG_CACHE_HOME"):
        monkeypatch.delenv(var, raising=False)
    for var, value in env.items():
        monkeypatch.setenv(var, value)
    assert cache_dir() == Path(expected)
