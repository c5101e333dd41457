"""Terminal tables fitted to 80, 120 and 200 columns (runtime/formats.py)."""

import pytest

from runtime.formats import Fit, render

LABELS = [f"normalization.kind={k}, regularization.dropout.rate={r}" for k in ("none", "batch", "layer")
          for r in ("0.0", "0.15", "0.3")]
COLUMNS = ["variant", "ok", "non_finite", "mean", "sd", "ci_low", "ci_high", "val_divergence",
           "val_divergence_sd", "groups", "seconds", "warnings"]
ROWS = [{"variant": lab, "ok": 5, "non_finite": 0, "mean": 0.9873, "sd": 0.007226, "ci_low": 0.9784,
         "ci_high": 0.9963, "val_divergence": 0.08665, "val_divergence_sd": 0.01382, "groups": 1,
         "seconds": 0.2441, "warnings": None} for lab in LABELS]
FIT = Fit(keep=("variant", "mean"), drop=("groups", "seconds"), wrap=("variant",))


@pytest.mark.parametrize("width", [80, 120, 200])
def test_every_line_fits_and_no_word_is_cut(width):
    text = render(ROWS, COLUMNS, "table", title="a title", width=width, fit=FIT)
    lines = text.splitlines()
    assert max(map(len, lines)) <= width
    # Labels wrap only between their parts: every "key=value" piece stays whole on one line.
    pieces = {p for lab in LABELS for p in lab.split(", ")}
    body = [w.rstrip(",") for line in lines for w in line.split()]
    assert pieces <= set(body)


def test_narrow_drops_declared_columns_first_and_says_so():
    text = render(ROWS, COLUMNS, "table", width=80, fit=FIT)
    head = text.splitlines()[0].split()
    assert head[:2] == ["variant", "ok"] and "mean" in head
    assert "groups" not in head and "seconds" not in head
    note = " ".join(text.splitlines()[-2:])
    assert "not shown at 80 columns:" in note and "groups" in note and "--wide" in note


def test_wide_layout_keeps_every_filled_column_and_one_line_per_row():
    text = render(ROWS, COLUMNS, "table", width=None, fit=FIT)
    lines = text.splitlines()
    assert len(lines) == 2 + len(ROWS)
    # An all-empty column carries nothing for a reader (warnings here); csv/json still have it.
    assert lines[0].split() == COLUMNS[:-1]
    assert "not shown" not in text
    at200 = render(ROWS, COLUMNS, "table", width=200, fit=FIT)
    assert at200 == text


def test_a_column_added_later_needs_no_layout_of_its_own():
    rows = [{**r, "effect_size": 1.25} for r in ROWS]
    text = render(rows, COLUMNS + ["effect_size"], "table", width=80, fit=FIT)
    assert max(map(len, text.splitlines())) <= 80
    assert "effect_size" in " ".join(text.splitlines()[-2:]) and "effect_size" not in text.splitlines()[0]


ESCAPE_ROWS = [{"variant": "fast\u202eevil", "mean": 0.5}, {"variant": "two\nlines\x1b[31m [bold]x", "mean": 0.25}]
@pytest.mark.parametrize("fmt", ["table", "markdown"])
def test_labels_with_newlines_or_bidi_controls_are_escaped_in_show_diff_and_replay(fmt):
    # Unicode TR #9 overrides (U+202E) reorder a terminal line (CVE-2021-42574); ESC starts an
    # ECMA-48 control sequence; a newline would break a row. Rich markup is not applied to text.
    text = render(ESCAPE_ROWS, ["variant", "mean"], fmt, title="vs baseline 'a\u202eb'")
    assert not {"\u202e", "\x1b"} & set(text)
    assert "fast\\u202eevil" in text and "two\\nlines\\x1b[31m [bold]x" in text and "a\\u202eb" in text
    assert len(text.splitlines()) == len(render(ESCAPE_ROWS[:1], ["variant", "mean"], fmt, title="t").splitlines()) + 1



def test_a_column_goes_when_that_puts_rows_on_fewer_lines_and_only_then():
    # the diff's layout at 80 columns: a row over three lines is harder to read than a column
    # named on the last line; a column whose going saves no line stays
    row = {"variant": "layer · dropconnect · 0.2", "ci": "[-0.4163, 0.01185]", "p": 0.05596,
           "verdict": "no detectable change", "extra": "an optional long column"}
    fit = Fit(keep=("variant", "ci", "verdict"), wrap=("variant", "ci", "verdict"))
    columns = list(row)
    lines = render([row], columns, "table", width=80, fit=fit).splitlines()
    assert lines[2].split("  ")[0] == "layer · dropconnect · 0.2" and "no detectable change" in lines[2]
    assert len(lines) == 4 and lines[3].startswith("not shown at 80 columns: extra (")
    # at 50 the kept columns wrap whatever goes: p (5 columns wide) stays, it would save no line
    narrow = render([row], columns, "table", width=50, fit=fit).splitlines()
    assert max(map(len, narrow)) <= 50 and narrow[0].split() == ["variant", "ci", "p", "verdict"]
    assert narrow[2].split()[:2] == ["layer", "·"] and narrow[4].strip() == "· 0.2"
    assert narrow[5].startswith("not shown at 50 columns: extra (")


def test_a_column_dropped_to_fit_comes_back_if_the_room_left_holds_it():
    # check's table of a tuned study: the long 'changes' goes (it would put every row on two
    # lines); the hash, seeds and program dropped before it fit beside the label again
    rows = [{"#": i, "label": f"plain, optimizer.learning_rate={lr}", "changes":
             f"optimizer.momentum=0.0, optimizer.learning_rate={lr}", "variant hash": "13d5e10a7b91",
             "seeds": "0..5", "program": "86eafd1abda9"} for i, lr in enumerate(("0.01", "0.03162", "0.1"))]
    fit = Fit(keep=("#", "label"), drop=("program", "seeds"), wrap=("label", "changes"))
    lines = render(rows, list(rows[0]), "table", width=80, fit=fit).splitlines()
    assert lines[0].split() == ["#", "label", "variant", "hash", "seeds", "program"]
    assert len(lines) == 2 + 3 + 1 and lines[-1].startswith("not shown at 80 columns: changes (")
