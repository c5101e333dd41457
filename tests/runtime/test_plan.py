"""Planning: groups by program key, fixed lane widths, padding (see runtime/plan.py)."""

from compiler.expand import expand
from compiler.spec import Spec
from runtime.plan import plan


def _variants():
    spec = Spec.model_validate({
        "study": {"name": "plan-check", "seeds": 3},
        "data": {"kind": "synthetic", "generator": "blobs", "samples": 200, "features": 4, "classes": 3},
        "divergence": {"kind": "kl"},
        "optimizer": {"kind": "sgd", "learning_rate": 0.1},
        "ablation": {"mode": "grid", "axis": [
            {"key": "optimizer.learning_rate", "values": [0.01, 0.1, 1.0]},
            {"key": "normalization.kind", "values": ["none", "batch"]},
        ]},
    })
    return expand(spec)


def test_groups_follow_the_program_key_not_knobs():
    groups = plan(_variants(), [0, 1, 2])
    # learning rate is a traced knob, normalization kind is in the program key: 2 programs of 3×3 runs
    assert [len(g.runs) for g in groups] == [9, 9]
    assert len({g.program for g in groups}) == 2
    assert all(g.lane_width == 9 and g.padding == 0 for g in groups)


def test_width_cap_pads_the_last_chunk():
    groups = plan(_variants(), [0, 1, 2], max_lanes=4)
    assert [len(g.runs) for g in groups] == [4, 4, 1, 4, 4, 1]
    assert {g.lane_width for g in groups} == {4}
    assert groups[2].padding == 3


def test_forced_width_and_every_run_once():
    groups = plan(_variants(), [0, 1, 2], lanes=16)
    ids = [r.run_id for g in groups for r in g.runs]
    assert len(ids) == len(set(ids)) == 18
    assert all(g.lane_width == 16 for g in groups)


def test_memory_budget_narrows_width():
    variants = _variants()
    s = variants[0].program
    groups = plan(variants, [0, 1, 2], lane_budget={s: 2})
    assert {g.lane_width for g in groups if g.program == s} == {2}
