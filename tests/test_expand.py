"""Ablation expansion: modes, labels, kind switches, neuron budgets, seeds, and invalid variants."""

from __future__ import annotations

import itertools

import pytest

from compiler.errors import SpecError
from compiler.loader import load_text

HEAD = '[study]\nname = "x"\nseeds = 2\n'


def _variants(body: str):
    return load_text(HEAD + body, "t.toml").variants


def _error(body: str) -> str:
    with pytest.raises(SpecError) as info:
        load_text(HEAD + body, "t.toml")
    return str(info.value)


def test_grid_is_the_cartesian_product_in_axis_order():
    # common practice: a full factorial design has one run per combination, last factor fastest.
    lrs, rates = [0.01, 0.1], [0.0, 0.2, 0.4]
    vs = _variants(f'[[ablation.axis]]\nkey = "optimizer.learning_rate"\nvalues = {lrs}\n'
                   f'[[ablation.axis]]\nkey = "regularization.dropout.rate"\nvalues = {rates}\n')
    assert [tuple(v.changes.values()) for v in vs] == list(itertools.product(lrs, rates))
    assert vs[1].label == "0.01 · 0.2"
    assert [v.spec.optimizer.learning_rate for v in vs] == [a for a, _ in itertools.product(lrs, rates)]
    assert [v.index for v in vs] == list(range(6))


def test_one_at_a_time_changes_each_value_alone_and_does_not_repeat_the_base():
    vs = _variants('[optimizer]\nkind = "sgd"\nlearning_rate = 0.1\n[ablation]\nmode = "one_at_a_time"\n'
                   '[[ablation.axis]]\nkey = "optimizer.learning_rate"\nvalues = [0.01, 0.1, 0.5]\n'
                   '[[ablation.axis]]\nkey = "training.epochs"\nvalues = [5]\n')
    assert [v.label for v in vs] == ["base", "learning_rate 0.01", "learning_rate 0.5", "epochs 5"]
    assert vs[3].spec.optimizer.learning_rate == 0.1 and vs[3].spec.training.epochs == 5


def test_list_mode_keeps_labels_and_can_leave_out_the_base():
    body = ('[ablation]\nmode = "list"\ninclude_base = {}\n'
            '[[ablation.variant]]\nlabel = "slow"\nchanges = {{ "optimizer.learning_rate" = 0.001 }}\n'
            '[[ablation.variant]]\nlabel = "wide"\nchanges = {{ "model.hidden" = [128, 128] }}\n')
    assert [v.label for v in _variants(body.format("true"))] == ["base", "slow", "wide"]
    vs = _variants(body.format("false"))
    assert [v.label for v in vs] == ["slow", "wide"]
    assert vs[1].spec.model.hidden == [128, 128]


def test_kind_switch_drops_the_old_kinds_defaults():
    vs = _variants('[optimizer]\nkind = "sgd"\nlearning_rate = 0.2\n'
                   '[[ablation.axis]]\nkey = "optimizer.kind"\nvalues = ["sgd", "adam"]\n')
    adam = vs[1].spec.optimizer
    assert adam.kind == "adam" and not hasattr(adam, "momentum")
    assert adam.learning_rate == 0.2            # what the user wrote carries over
    assert adam.b2 == 0.999                     # Kingma & Ba 2015, the paper's default β2


def test_kind_switch_refuses_a_key_the_user_set_that_the_new_kind_lacks():
    message = _error('[optimizer]\nkind = "sgd"\nmomentum = 0.9\n'
                     '[[ablation.axis]]\nkey = "optimizer.kind"\nvalues = ["sgd", "adam"]\n')
    assert "t.toml:9: ablation.axis[0].values[1]: variant 'adam' (optimizer.kind=adam) is invalid: optimizer.momentum" in message
    assert "the base spec sets optimizer.momentum" in message


def test_a_change_inside_a_default_section_keeps_its_kind():
    vs = _variants('[[ablation.axis]]\nkey = "optimizer.momentum"\nvalues = [0.0, 0.9]\n')
    assert [(v.spec.optimizer.kind, v.spec.optimizer.momentum) for v in vs] == [("sgd", 0.0), ("sgd", 0.9)]


def test_neuron_budget_expands_to_equal_widths():
    vs = _variants('[model]\nhidden = { neurons = 96, depth = 1 }\n[ablation]\nmode = "list"\n'
                   '[[ablation.variant]]\nlabel = "deep"\nchanges = { "model.hidden.depth" = 3 }\n')
    assert [v.spec.model.hidden for v in vs] == [[96], [32, 32, 32]]


def test_invalid_combination_names_the_variant():
    message = _error('[data]\nclasses = 3\n[[ablation.axis]]\nkey = "divergence.kind"\nvalues = ["kl", "bce"]\n')
    assert "variant 'bce' (divergence.kind=bce) is invalid: divergence.kind: 'bce' is binary but data.classes = 3" in message


def test_duplicate_variants_are_refused():
    message = _error('[[ablation.axis]]\nkey = "model.hidden"\nvalues = [[32, 32], { neurons = 64, depth = 2 }]\n')
    assert "is the same configuration as '[32,32]'" in message


@pytest.mark.parametrize("seeds, expected", [("4", [0, 1, 2, 3]), ("[7, 3, 11]", [7, 3, 11])])
def test_seeds_as_count_or_list(seeds, expected):
    study = load_text(f'[study]\nname = "x"\nseeds = {seeds}\n'
                      '[[ablation.axis]]\nkey = "training.epochs"\nvalues = [3, 6]\n')
    assert study.seeds == expected and study.runs == 2 * len(expected)


def test_knob_only_changes_share_a_program_and_kind_changes_do_not():
    vs = _variants('[normalization]\nkind = "batch"\n'
                   '[[ablation.axis]]\nkey = "normalization.kind"\nvalues = ["batch", "layer"]\n'
                   '[[ablation.axis]]\nkey = "optimizer.learning_rate"\nvalues = [0.01, 0.1]\n')
    assert vs[0].program == vs[1].program != vs[2].program == vs[3].program
    assert len({v.hash for v in vs}) == 4


def _axes(*sizes: int) -> str:
    keys = ["optimizer.learning_rate", "optimizer.momentum", "regularization.weight_decay"]
    return "".join(f'[[ablation.axis]]\nkey = "{k}"\nvalues = {[round((i + 1) / (n + 1), 6) for i in range(n)]}\n'
                   for k, n in zip(keys, sizes))


def test_a_grid_of_millions_is_refused_by_its_count_before_expanding():
    # 200³ = 8,000,000 variants (the size the tester's study asked for); counting is arithmetic,
    # building them would take hours.
    message = _error(_axes(200, 200, 200))
    assert message.startswith("t.toml:4: ablation: the grid (200 × 200 × 200) makes 8,000,000 variants, "
                              "above the limit of 10,000;"), message
    assert "LESION_MAX_VARIANTS=8000000" in message and "\n" not in message


def test_the_variant_limit_is_raised_or_lowered_by_its_environment_knob(monkeypatch):
    monkeypatch.setenv("LESION_MAX_VARIANTS", "6")
    assert len(_variants(_axes(2, 3))) == 6
    # one at a time: the base + 3 + 4 values
    assert "one value at a time (the base + 3 + 4) makes 8 variants, above the limit of 6" in \
        _error('[ablation]\nmode = "one_at_a_time"\n' + _axes(3, 4))
    monkeypatch.setenv("LESION_MAX_VARIANTS", "5")
    assert "makes 6 variants, above the limit of 5" in _error(_axes(2, 3))
    monkeypatch.setenv("LESION_MAX_VARIANTS", "lots")
    assert "LESION_MAX_VARIANTS='lots': expected a positive whole number" in _error(_axes(2, 3))


def test_an_axis_name_labels_its_values_and_two_axes_may_not_share_one():
    vs = _variants('[ablation]\nmode = "one_at_a_time"\n'
                   '[[ablation.axis]]\nkey = "optimizer.learning_rate"\nname = "lr"\nvalues = [0.01]\n'
                   '[[ablation.axis]]\nkey = "regularization.dropout.rate"\nvalues = [0.2]\n')
    assert [v.label for v in vs] == ["base", "lr 0.01", "dropout.rate 0.2"]
    message = _error('[[ablation.axis]]\nkey = "optimizer.learning_rate"\nname = "a"\nvalues = [0.01]\n'
                     '[[ablation.axis]]\nkey = "training.epochs"\nname = "a"\nvalues = [2]\n')
    assert "axis names must be distinct (repeated: ['a'])" in message
