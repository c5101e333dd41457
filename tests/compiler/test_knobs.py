"""Knobs and program keys are derived from the schema: every field of a component reaches its
factory, and every field of a variant decides either its program key or a knob value.

These guard against a field that is validated, hashed and then silently ignored: a knob missing
from what the compiler hands a factory made a Huber study with ``delta = 0.05`` train with the
factory's default of 1.0 under the same variant hash.
"""

import copy
import inspect
import pathlib
import sys
import typing

import jax
import jax.numpy as jnp
import pytest

from compiler import build, model
from compiler.data import load_data
from compiler.expand import expand
from compiler.hashing import KNOBS, knobs_of, models_in, sections, program_key, variant_payload
from compiler.spec import Spec, Strict

sys.path.insert(0, str(pathlib.Path(__file__).parent))  # the suite imports in importlib mode
import components  # noqa: E402

# Between them these use every row of the component table: every kind of every family, with
# non-default values where a field has one to change.
BASES = {
    **components.bases(),
    # Only hashed, never trained: the data file does not exist.
    "file-data": {
        "data": {"kind": "file", "path": "table.csv", "target": "label", "features": ["a", "b"]},
    },
}
TRAINED = [name for name in BASES if name != "file-data"]
REGISTRIES = {family: registry for family, (_, registry) in components.FAMILIES.items()}


def _variant(raw: dict) -> Spec:
    return expand(Spec.model_validate({"study": {"name": "knobs", "metric": "train_divergence"}, **copy.deepcopy(raw)}))[0].spec


def _schema_models(model=Spec, skip=("study", "ablation")) -> set[type]:
    out = {model}
    for name, info in model.model_fields.items():
        if name not in skip:
            for sub in models_in(info.annotation):
                out |= _schema_models(sub, ())
    return out


def _fields(section) -> list[str]:
    """A section's own fields: not its ``kind`` (the registry key), not nested sections."""
    return [name for name in type(section).model_fields
            if name != "kind" and not isinstance(getattr(section, name), Strict)]


def test_knob_marks_name_real_valued_fields_of_their_model():
    for model in _schema_models():
        for name in model.knobs:
            assert name in model.model_fields, f"{model.__name__}.knobs names {name!r}, which is not a field"
            annotation = model.model_fields[name].annotation
            assert annotation is float, f"{model.__name__}.{name} is a knob but not a float ({annotation})"


def test_the_bases_use_every_model_of_the_schema():
    used = {type(section) for raw in BASES.values() for _, section in sections(_variant(raw))}
    # Expansion resolves a budget into a list of widths or blocks: no variant holds one.
    assert {m.__name__ for m in _schema_models() - used} == {"NeuronBudget", "ChannelBudget"}


def test_knobs_are_derived_from_the_marks():
    # The paths the variants' knob fields live at, collected from the models themselves.
    found = {prefix + name for raw in BASES.values() for prefix, section in sections(_variant(raw))
             for name in type(section).knobs}
    assert set(KNOBS) == found


# ── every field reaches its factory ─────────────────────────────────────────────────────────────
@pytest.fixture(scope="module")
def factory_calls():
    """For each trained base: its variant, the traced knob values ``init`` received, and every
    call of a registered factory while ``init`` was traced, as (section, kind, arguments given)."""
    out = {}
    with pytest.MonkeyPatch.context() as mp:
        calls = []
        for section, registry in REGISTRIES.items():
            for kind, real in list(registry.items()):
                factory = real.network if isinstance(real, model.Family) else real

                def recorder(*args, _section=section, _kind=kind, _real=factory, **kwargs):
                    given = inspect.signature(_real).bind_partial(*args, **kwargs).arguments
                    calls.append((_section, _kind, dict(given)))
                    return _real(*args, **kwargs)
                mp.setitem(registry, kind, real._replace(network=recorder) if factory is not real else recorder)
        for name in TRAINED:
            v = _variant(BASES[name])
            ds = load_data(v, pathlib.Path("."))
            prog = build.compile_program([v], ds)
            traced = {}

            def init(knobs):
                traced.update(knobs)
                return prog.init(knobs, build.seed_key(0), ds.x, ds.y)

            calls.clear()
            jax.make_jaxpr(init)({k: jnp.float32(x) for k, x in build.knob_vector(v).items()})
            out[name] = (v, traced, list(calls))
    return out


def test_every_registered_kind_is_built(factory_calls):
    built = {(section, kind) for _, _, calls in factory_calls.values() for section, kind, _ in calls}
    assert built == {(section, kind) for section, registry in REGISTRIES.items() for kind in registry}


@pytest.mark.parametrize("name", TRAINED)
def test_every_field_of_a_component_reaches_its_factory(factory_calls, name):
    v, traced, calls = factory_calls[name]
    checked = 0
    for prefix, section in sections(v):
        path = prefix.rstrip(".")
        if path not in REGISTRIES:
            continue
        mine = [given for s, kind, given in calls if s == path]
        assert mine and all(kind == section.kind for s, kind, _ in calls if s == path)
        below = [value for s, _, given in calls if s == path or s.startswith(prefix) for value in given.values()]
        for given in mine:
            for field in _fields(section):
                assert field in given, f"{prefix}{field} does not reach the {section.kind!r} factory"
                if field in type(section).knobs:
                    # The traced knob itself, here or in a factory of a nested section (the
                    # learning rate reaches the schedule, whose result the optimizer receives).
                    assert any(value is traced[prefix + field] for value in below), f"{prefix}{field}"
                else:
                    assert not isinstance(given[field], jax.core.Tracer), f"{prefix}{field} is part of the program key"
                    assert given[field] == getattr(section, field), f"{prefix}{field}"
                checked += 1
    assert checked


# ── every field decides the program key or a knob ──────────────────────────────────────────────
def _leaves(tree: dict, prefix: str = ""):
    for key, value in tree.items():
        if isinstance(value, dict):
            yield from _leaves(value, f"{prefix}{key}.")
        else:
            yield prefix + key, value


def _options(v: Spec, path: str, value) -> list:
    """Other values for the field at ``path``, the valid ones among them found by validation."""
    *head, name = path.split(".")
    owners = dict(sections(v))
    owner = owners[".".join(head) + "." if head else ""]
    annotation = type(owner).model_fields[name].annotation
    if name == "kind" and head:
        parent = owners[".".join(head[:-1]) + "." if len(head) > 1 else ""]
        alternatives = models_in(type(parent).model_fields[head[-1]].annotation)
        literals = [k for m in alternatives for k in typing.get_args(m.model_fields["kind"].annotation)]
        literals += list(typing.get_args(annotation))
        return [k for k in dict.fromkeys(literals) if k != value]
    if typing.get_origin(annotation) is typing.Literal:
        return [k for k in typing.get_args(annotation) if k != value]
    if isinstance(value, bool):
        return [not value]
    if isinstance(value, int):
        return [value + 1, value - 1, value * 2]
    if isinstance(value, float):
        return [x for x in (value * 0.5, value + 0.1, 0.3, 0.9) if x != value]
    if isinstance(value, str):
        return ["a" + value]
    if isinstance(value, list):
        return [value + [value[-1] if value else 4], value[:-1]]
    return [["a"], 1]  # an optional field left unset


def _changed(v: Spec, path: str, new) -> Spec | None:
    """The variant with one field changed, or None when that is not a valid variant. A changed
    ``kind`` may also drop the fields the old kind had."""
    *head, name = path.split(".")
    trees = []
    for whole_section in ([False, True] if name == "kind" and head else [False]):
        tree = variant_payload(v)
        node = tree
        for part in head[:-1] if whole_section else head:
            node = node[part]
        if whole_section:
            node[head[-1]] = {"kind": new}
        else:
            node[name] = new
        trees.append(tree)
    for tree in trees:
        try:
            return _variant(tree)
        except Exception:  # noqa: BLE001 - an invalid combination; the next option may do
            continue
    return None


def test_changing_any_field_changes_the_program_key_or_a_knob_value():
    covered = set()
    every = set()
    for raw in BASES.values():
        v = _variant(raw)
        key, knobs = program_key(v), knobs_of(v)
        for path, value in _leaves(variant_payload(v)):
            every.add(path)
            other = next((w for w in (_changed(v, path, o) for o in _options(v, path, value)) if w), None)
            if other is None:
                continue  # no valid other value in this base; another base must cover the path
            covered.add(path)
            if path in knobs:
                assert program_key(other) == key and knobs_of(other) != knobs, path
            else:
                assert program_key(other) != key, f"{path} changed but neither the program key nor a knob did"
    # A file's task never changes alone: the divergence has to match it.
    assert every - covered == {"data.task"}
