"""runtime/formats.py, the one renderer of show, diff and replay: user text in terminal formats."""

from __future__ import annotations

import pytest

from runtime.formats import render

ROWS = [{"variant": "fast\u202eevil", "mean": 0.5}, {"variant": "two\nlines\x1b[31m [bold]x", "mean": 0.25}]


@pytest.mark.parametrize("fmt", ["table", "markdown"])
def test_labels_with_newlines_or_bidi_controls_are_escaped_in_show_diff_and_replay(fmt):
    # Unicode TR #9 overrides (U+202E) reorder a terminal line (CVE-2021-42574); ESC starts an
    # ECMA-48 control sequence; a newline would break a row. Rich markup is not applied to text.
    text = render(ROWS, ["variant", "mean"], fmt, title="vs baseline 'a\u202eb'")
    assert not {"\u202e", "\x1b"} & set(text)
    assert "fast\\u202eevil" in text and "two\\nlines\\x1b[31m [bold]x" in text and "a\\u202eb" in text
    assert len(text.splitlines()) == len(render(ROWS[:1], ["variant", "mean"], fmt, title="t").splitlines()) + 1

