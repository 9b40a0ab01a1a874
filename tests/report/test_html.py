"""HTML and Markdown reports: content, escaping, pictures, and rendering in a real headless browser."""
import base64
import html.parser
import shutil
import subprocess
from dataclasses import dataclass, field

import matplotlib.image
import numpy as np
import pytest

from refops.numerics.compare import compare
from refops.report.html import render_html, write_html
from refops.report.markdown import render_markdown
from refops.report.wording import CAUTION


@dataclass
class Case:
    case_id: str
    config: dict
    comparisons: list
    status: str = "passed"
    values: str = "normal"
    findings: list = field(default_factory=list)
    message: str = ""
    replay: str = ""
    seconds: float = 0.01

    @property
    def passed(self):
        return self.status == "passed"


@dataclass
class Report:
    cases: list
    op: str = "conv2d"
    target: str = "lab.kernels:<fused>"
    dtype: str = "bfloat16"
    seed: int = 0
    model: str = "rounding bound"
    deviations: list = field(default_factory=lambda: ["a declared deviation"])

    @property
    def passed(self):
        return all(c.passed for c in self.cases)

    @property
    def failures(self):
        return [c for c in self.cases if not c.passed]

    def summary(self):
        counts = {}
        for c in self.cases:
            counts[c.status] = counts.get(c.status, 0) + 1
        return counts


def comparison(tensor, bump=0.0, seed=0):
    rng = np.random.default_rng(seed)
    reference = rng.standard_normal((2, 3, 6, 5))
    allowed = np.full(reference.shape, 1e-3)
    subject = reference + rng.uniform(-5e-4, 5e-4, reference.shape)
    subject[1, 2, 5, :] += bump  # one hot stripe along the bottom border
    return compare(tensor, subject, reference, allowed, "float32", model="rounding bound")


def sample_report():
    passing = [Case(f"ok-{i}", {"kernel_size": 3}, [comparison("output", seed=i), comparison("input", seed=i)])
                for i in range(3)]
    failing = Case("bad-<1>", {"padding": "same", "kernel_size": 2}, [comparison("output"), comparison("input", 0.1)],
                   status="failed", findings=["input changed in place"], replay="refops check x:y --case bad-1")
    return Report(passing + [failing])


class Collector(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.images, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.images.append(dict(attrs)["src"])

    def handle_data(self, data):
        self.text.append(data)


def test_html_holds_tables_images_caution_and_escaped_text():
    doc = render_html(sample_report())
    parsed = Collector()
    parsed.feed(doc)
    text = "".join(parsed.text)
    assert parsed.tags.count("table") == 3  # summary, failing-tensor statistics, worst elements
    # heatmap + histogram for the failing tensor, plus the passing-share chart
    assert len(parsed.images) == 3 and all(src.startswith("data:image/png;base64,") for src in parsed.images)
    for src in parsed.images:
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    assert CAUTION in text and "bad-<1>" in text and "<fused>" in text
    assert "bad-<1>" not in doc and "&lt;fused&gt;" in doc  # user text is escaped, never markup
    assert "input changed in place" in text and "refops check x:y --case bad-1" in text
    assert "http" not in doc.replace("http-equiv", "")  # self-contained: no external assets


def test_markdown_lists_failing_tensors_and_replay():
    md = render_markdown(sample_report())
    assert md.startswith("## refops: FAILED")
    assert "### Case `bad-<1>`: failed" in md and "`refops check x:y --case bad-1`" in md
    assert "**input**: 5 elements over the bound" in md  # the stripe of width 5
    assert "**output**" not in md and CAUTION in md


def test_html_renders_in_headless_chromium(tmp_path):
    browser = shutil.which("chromium")
    if browser is None:
        pytest.fail("Debian's chromium is needed for this test (.ci/run installs it: apt-get install chromium)")
    page = write_html(sample_report(), tmp_path / "report.html")
    shot = tmp_path / "shot.png"
    subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                    "--disable-background-networking", "--disable-component-update", "--disable-sync",
                    f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,1600",
                    page.as_uri()], check=True, capture_output=True, timeout=120)
    pixels = matplotlib.image.imread(shot)[..., :3]
    non_white = np.mean(np.any(pixels < 0.95, axis=-1))
    assert non_white > 0.03, f"screenshot is nearly blank ({non_white:.3%} non-white pixels)"
    assert pixels.std() > 0.05
