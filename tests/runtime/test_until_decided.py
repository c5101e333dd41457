"""lesion run --until-decided on a small real study: an arm that clearly hurts is settled at the
first look and stops consuming runs while a close question goes on; a procedure killed in the middle
of a look, run again, makes the same decisions with the same seeds and the same bits; show and diff
say the seeds were chosen sequentially; bad options are one-line errors."""

import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.diff import diff_baseline, diff_design
from runtime.interrupt import Interrupted
from runtime.runner import run_until_decided
from runtime.sequential import Rule
from runtime.store import open_result_set

cli = CliRunner()

RULE = Rule(margin=0.01, max_seeds=12, round=3)


def _decisions(seq):
    p = seq.procedure
    return {key[2:4]: (s.verdict, s.look, s.seeds) for key, s in p.settled.items()}


def _bits(path):
    runs = pq.read_table(path / "runs.parquet").to_pydict()
    return dict(zip(runs["run_id"], zip(runs["param_hash"], runs["lane_width"])))


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory, decided_spec):
    tmp = tmp_path_factory.mktemp("until")
    loaded = load_study(decided_spec(tmp))
    reports, seq = run_until_decided(loaded, tmp / "out", RULE)
    return loaded, reports, seq, reports[-1].path


def test_clear_arm_settles_at_the_first_look_and_stops_running(uninterrupted):
    loaded, reports, seq, path = uninterrupted
    decided = _decisions(seq)
    assert decided[("base", "stalled")][:2] == ("worse", 1)
    assert decided[("base", "light")][1] >= 2       # the close question needed more seeds
    runs = open_result_set(path).runs.to_pydict()
    per_arm = {}
    for label, seed in zip(runs["variant_label"], runs["seed"]):
        per_arm.setdefault(label, []).append(seed)
    assert sorted(per_arm["stalled"]) == list(range(6))          # no seed after its look
    assert sorted(per_arm["light"]) == sorted(per_arm["base"])   # open arms share their new seeds
    assert len(per_arm["base"]) == decided[("base", "light")][2] > 6
    # one width for the program in every look: 3 variants × a round of 3 seeds
    assert set(runs["lane_width"]) == {9}


def test_killed_mid_procedure_resumes_to_the_same_decisions_seeds_and_bits(uninterrupted, tmp_path, decided_spec):
    loaded = load_study(decided_spec(tmp_path))
    assert loaded.study_hash == uninterrupted[0].study_hash
    seen = {"groups": 0, "epochs": 0}

    def progress(event, **info):
        if event == "stored":
            seen["groups"] += 1
        elif event == "epoch" and seen["groups"] == 2:   # the first look's two groups are stored
            seen["epochs"] += 1

    def checkpoint():
        if seen["epochs"] == 2:   # inside the second look's group, between two epochs: it is lost
            seen["epochs"] += 1
            raise Interrupted()

    with pytest.raises(Interrupted):
        run_until_decided(loaded, tmp_path / "out", RULE, progress=progress, checkpoint=checkpoint)
    assert open_result_set(tmp_path / "out" / loaded.result_set).runs.num_rows == 18   # the first look only
    _, seq = run_until_decided(loaded, tmp_path / "out", RULE)
    assert _decisions(seq) == _decisions(uninterrupted[2])
    assert seq.procedure.looks == uninterrupted[2].procedure.looks
    assert _bits(tmp_path / "out" / loaded.result_set) == _bits(uninterrupted[3])


def test_show_and_diff_use_the_stopping_rule(uninterrupted):
    _, _, seq, path = uninterrupted
    rs = open_result_set(path)
    assert rs.meta["sequential"]["max_seeds"] == 12 and rs.meta["sequential"]["first"] == list(range(6))
    report = diff_design(rs)
    assert report.sequential and "seeds chosen sequentially" in report.notes[0]
    by = {(r["variant_a"], r["variant_b"]): r for r in report.rows}
    for (a, b), (verdict, look, seeds) in _decisions(seq).items():
        assert by[(a, b)]["verdict"] == verdict and by[(a, b)]["n_a"] == seeds
    # each variant vs base is this list's design question: --baseline base gives the rule's verdicts too
    assert [r["verdict"] for r in diff_baseline(rs, "base").rows] == [r["verdict"] for r in report.rows]
    assert "ignore the stopping rule" in diff_baseline(rs, "light").notes[0]
    shown = cli.invoke(app, ["show", str(path)])
    assert shown.exit_code == 0 and "seeds chosen sequentially" in shown.stdout
    assert "does not derive" not in shown.stderr


@pytest.mark.parametrize("args, message", [
    (["--margin", "0.01"], "belong to --until-decided"),
    (["--until-decided"], "needs a positive practical margin"),
    (["--until-decided", "--margin", "0.01", "--max-seeds", "6"], "already runs 6 seeds"),
    (["--until-decided", "--margin", "0.01", "--fresh"], "--fresh"),
    (["--until-decided", "--margin", "0.01", "--axis", "optimizer.kind"], "not an axis"),
])
def test_bad_options_are_one_line_errors(tmp_path, decided_spec, args, message):
    res = cli.invoke(app, ["run", str(decided_spec(tmp_path, "bad")), "--results", str(tmp_path / "o"), *args])
    assert res.exit_code == 2, res.output
    assert message in res.stderr and "Traceback" not in res.stderr
    assert not (tmp_path / "o").exists()   # nothing was created


def test_another_rule_on_the_same_result_set_is_refused(uninterrupted):
    loaded, reports, _, path = uninterrupted
    res = cli.invoke(app, ["run", loaded.path, "--results", str(path.parent), "--until-decided", "--margin", "0.02",
                           "--max-seeds", "12", "--round", "3"])
    assert res.exit_code == 2 and "another stopping rule" in res.stderr and "margin 0.01 → 0.02" in res.stderr


def test_replay_reproduces_every_run_of_every_look(uninterrupted):
    from runtime.replay import replay

    report = replay(uninterrupted[3])
    assert len(report.rows) == open_result_set(uninterrupted[3]).runs.num_rows > 18   # seeds of later looks too
    assert report.identical, [r.as_dict() for r in report.rows if not r.as_dict().get("identical", True)]
