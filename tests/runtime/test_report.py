"""lesion report: one self-contained page, checked in a real headless Chromium (nothing requested,
every section there, the pictures laid out, user text shown as text and never run)."""

import json
import re
import shutil
import subprocess
from html.parser import HTMLParser

import pytest
from typer.testing import CliRunner

from compiler.loader import load_study
from runtime.cli import app
from runtime.diff import diff_baseline
from runtime.report import SECTIONS
from runtime.runner import run_study

# A list study whose description and variant label are markup: both must reach the reader as text.
HOSTILE = r'''
[study]
name = "vat-check"
description = "Brine vats <script>window.__pwned = 1</script> & \"quotes\""
seeds = 3

[data]
generator = "blobs"
samples = 160
features = 3
classes = 2
noise = 0.5

[model]
hidden = [4]

[optimizer]
kind = "sgd"
learning_rate = 0.1

[training]
epochs = 2
batch_size = 32

[ablation]
mode = "list"

[[ablation.variant]]
label = "<img src=x onerror=window.__pwned=1>"
changes = { "optimizer.learning_rate" = 0.3 }
'''
LABEL = "<img src=x onerror=window.__pwned=1>"

# Appended to a copy of the page: what the browser fetched (Resource Timing, W3C: failed http(s)
# fetches are listed too, file:// ones are not, hence the count of referencing elements beside it)
# and what it laid out, written into the DOM for --dump-dom to print.
PROBE = """<script>
window.addEventListener("load", () => {
  const out = {
    resources: performance.getEntriesByType("resource").map(e => e.name),
    pwned: window.__pwned || 0,
    sections: [...document.querySelectorAll("section")].map(s => s.id),
    svgs: [...document.querySelectorAll("figure svg")].map(s => s.getBoundingClientRect().width),
    external: [...document.querySelectorAll("[src],[href],link,iframe,object,embed")].length,
    text: document.body.innerText,
  };
  const pre = document.createElement("pre");
  pre.id = "probe";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


def _chromium() -> str | None:
    return next((p for p in (shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome")) if p), None)


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    (tmp / "vat-check.toml").write_text(HOSTILE)
    path = run_study(load_study(tmp / "vat-check.toml"), tmp / "r").path
    result = CliRunner().invoke(app, ["report", str(path), "-o", str(tmp / "review.html")])
    assert result.exit_code == 0, result.output
    return path, tmp / "review.html"


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.refs = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.refs += [v for k, v in attrs if k in ("src", "href", "xlink:href") and v and not v.startswith("#")]


def test_page_has_no_script_and_no_outside_reference(page):
    # parsed by the standard library's HTML parser, not by lesion
    _, html = page
    tags = _Tags()
    tags.feed(html.read_text())
    assert "script" not in tags.tags and "img" not in tags.tags and "link" not in tags.tags
    assert tags.refs == []
    assert tags.tags.count("svg") >= 2


def test_page_verdicts_are_those_of_diff_baseline(page):
    from runtime.store import open_result_set

    path, html = page
    [row] = diff_baseline(open_result_set(path), "base").rows
    text = html.read_text()
    verdicts = re.search(r'<section id="verdicts">(.*?)</section>', text, re.S).group(1)
    assert row["verdict"] in verdicts and f"{row['mean_b']:.4g}" in verdicts


def test_page_in_a_headless_browser_loads_nothing_and_shows_its_sections(page, tmp_path):
    browser = _chromium()
    if browser is None:
        pytest.skip("no Chromium installed (Debian: apt-get install chromium); the browser check needs one")
    _, html = page
    probe = tmp_path / "probe.html"
    probe.write_text(html.read_text().replace("</body>", PROBE + "</body>"))
    run = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
                          "--dump-dom", probe.as_uri()], capture_output=True, text=True, timeout=120)
    found = re.search(r'<pre id="probe">(.*?)</pre>', run.stdout, re.S)
    assert found, run.stderr[-2000:]
    out = json.loads(found.group(1).replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&"))
    assert out["resources"] == []          # nothing fetched, so nothing could fail to load
    assert out["external"] == 0
    assert out["sections"] == list(SECTIONS)
    assert len(out["svgs"]) >= 2 and all(w > 300 for w in out["svgs"])  # pictures laid out
    assert out["pwned"] == 0               # the markup in the spec did not run ...
    assert LABEL in out["text"] and "<script>window.__pwned = 1</script>" in out["text"]  # ... it is shown


def test_bad_output_name_and_unknown_baseline_are_refused_without_a_traceback(page, tmp_path):
    path, _ = page
    result = CliRunner().invoke(app, ["report", str(path), "-o", str(tmp_path / "x.pdf")])
    assert result.exit_code == 2, result.output
    assert len(result.stderr.strip().splitlines()) == 1 and "expected a file ending in .html" in result.stderr
    # An unknown variant: one line saying so, then the choices one per line (labels contain ", ").
    result = CliRunner().invoke(app, ["report", str(path), "--baseline", "nope"])
    assert result.exit_code == 2, result.output
    first, *choices = result.stderr.strip().splitlines()
    assert "no such variant" in first and choices and "Traceback" not in result.stderr


def test_a_label_the_user_wrote_is_shown_as_written_in_the_legend(page):
    from runtime.plot import plot_curves
    from runtime.store import open_result_set

    path, _ = page
    legend = [t.get_text() for t in plot_curves(open_result_set(path)).legends[0].get_texts()]
    assert f"{LABEL} (n=3)" in legend  # wrapped at its spaces for ticks, never given commas

