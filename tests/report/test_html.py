"""The HTML report: content, pictures, escaping, self-containment, and a real headless browser."""
import base64
import html.parser
import io
import shutil
import subprocess

import matplotlib
import matplotlib.image
import numpy as np
import pytest

from refops.report.html import render_html, write_html
from refops.report.wording import CAUTION

from .sample_reports import HOT_ROW, case, report


class Page(html.parser.HTMLParser):
    """Tags, images, text and tables (rows of cell texts) of an HTML document."""

    def __init__(self, doc):
        super().__init__()
        self.tags, self.images, self.text, self.tables = [], [], [], []
        self._cell = None
        self.feed(doc)

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.images.append(dict(attrs))
        elif tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self.tables[-1][-1].append("".join(self._cell).strip())
            self._cell = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)

    def table_with(self, header):
        return next(t for t in self.tables if t and t[0][:len(header)] == header)


def png_pixels(src):
    assert src.startswith("data:image/png;base64,")
    return matplotlib.image.imread(io.BytesIO(base64.b64decode(src.split(",", 1)[1])), format="png")


def test_summary_names_the_settings_status_counts_and_deviations(failing_report):
    page = Page(render_html(failing_report))
    summary = dict(page.tables[0])
    assert summary["op"] == "conv2d" and summary["subject"] == "lab.kernels:<fused>"
    assert summary["format"] == "bfloat16" and summary["seed"] == "0"
    assert summary["tolerance model"] == "rounding bound (probabilistic)"
    assert summary["cases"] == "4" and summary["cases passed"] == "3" and summary["cases failed"] == "1"
    text = "".join(page.text)
    assert "a declared deviation" in text and CAUTION in text and "FAILED" in text


def test_failing_tensor_has_heatmaps_histogram_and_its_worst_elements(failing_report):
    page = Page(render_html(failing_report))
    text = "".join(page.text)
    # the input gradient's planted stripe: 5 elements, each about 100 times its allowed error
    assert "input: 5 elements over the bound" in text and "output: " not in text
    worst = page.table_with(["index", "subject", "oracle", "error", "allowed", "error / allowed", "ulps"])[1:]
    assert len(worst) == 5
    assert sorted(row[0] for row in worst) == [str((*HOT_ROW, j)) for j in range(5)]
    assert all(99 < float(row[5]) < 101 for row in worst)  # 0.1 / 1e-3 = 100, +-0.5 of noise
    # heatmaps + histogram of the failing tensor, and the chart of the passing cases' shares
    assert [img["alt"].split(",")[0] for img in page.images] == [
        "heatmaps of error over allowed", "histogram of error against the bound", "share of the bound used"]
    for img in page.images:
        pixels = png_pixels(img["src"])
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 200
    assert "refops check lab.kernels:fused --op conv2d --case 0-3" in text
    assert "input changed in place" in text


def test_heatmap_shows_the_bound_crossing_in_the_top_half_of_the_colour_scale(failing_report):
    # Reference: matplotlib's cividis map; values over the bound sit in its upper (yellow) half.
    page = Page(render_html(failing_report))
    pixels = png_pixels(page.images[0]["src"])[..., :3]
    top = np.array(matplotlib.colormaps["cividis"](1.0)[:3])
    assert np.sum(np.all(np.abs(pixels - top) < 0.05, axis=-1)) > 2000  # the stripe; the colour bar has < 100


def test_all_cases_table_lists_every_case_with_its_share_per_tensor(failing_report):
    page = Page(render_html(failing_report))
    table = page.table_with(["case", "status", "values", "output", "input", "seconds"])
    assert [row[0] for row in table[1:]] == ["0-0", "0-1", "0-2", "0-3"]
    assert [row[1].split()[-1] for row in table[1:]] == ["passed"] * 3 + ["failed"]
    assert 99 < float(table[4][4]) < 101 and all(float(row[3]) < 1 for row in table[1:])


def test_user_text_is_escaped_never_markup():
    hostile = case("0-<9>", bump=0.1, message="<script>alert(1)</script>",
                   findings=["<img src=x onerror=alert(1)>"])
    hostile.config = {"padding": "<i>same</i>"}
    doc = render_html(report([hostile], target="lab.<b>kernels</b>:f", deviations=["<a href='x'>d</a>"]))
    page = Page(doc)
    assert not {"script", "b", "i", "a"} & set(page.tags)
    assert all(img["src"].startswith("data:image/png;base64,") for img in page.images)
    text = "".join(page.text)
    for shown in ("<script>alert(1)</script>", "<img src=x onerror=alert(1)>", "'<i>same</i>'",
                  "lab.<b>kernels</b>:f", "<a href='x'>d</a>", "0-<9>"):
        assert shown in text


def test_page_is_self_contained(failing_report):
    doc = render_html(failing_report)
    page = Page(doc)
    assert "link" not in page.tags and "script" not in page.tags
    assert all(img["src"].startswith("data:image/png;base64,") for img in page.images)
    assert "url(" not in doc and "http://" not in doc and "https://" not in doc


def test_only_the_first_failing_cases_get_pictures():
    failures = [case(f"0-{i}", bump=0.1, seed=i) for i in range(3)]
    page = Page(render_html(report(failures), pictured=1))
    assert len(page.images) == 2  # heatmaps + histogram of the first case; no passing cases to chart
    assert "Pictures are drawn for the first 1 failing cases; the other 2 show their tables." in "".join(page.text)
    assert len([t for t in page.tables if t[0][0] == "index"]) == 3  # every case keeps its worst elements


def test_passing_report_charts_the_share_of_the_bound_used(passing_report):
    page = Page(render_html(passing_report))
    text = "".join(page.text)
    assert "PASSED" in text and "Failing cases" in text and "None." in text
    assert [img["alt"] for img in page.images] == ["share of the bound used"]


def test_write_html_writes_the_rendered_page(tmp_path, failing_report):
    path = write_html(failing_report, tmp_path / "r.html")
    assert path == tmp_path / "r.html"
    page = Page(path.read_text(encoding="utf-8"))
    assert len(page.images) == 3


def test_bad_picture_count_names_the_argument(failing_report):
    with pytest.raises(ValueError, match=r"pictured=-1: must be >= 0"):
        render_html(failing_report, pictured=-1)


def test_html_renders_in_headless_chromium(tmp_path, failing_report):
    # Deliberately a failure, not a skip, where chromium is missing: CI must render the page.
    browser = shutil.which("chromium")
    if browser is None:
        pytest.fail("Debian's chromium is needed to render the HTML report: "
                    "apt-get update -qq && apt-get install -y -qq chromium  (.ci/run does this)")
    page = write_html(failing_report, tmp_path / "report.html")
    shot = tmp_path / "shot.png"
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,2000"]
    run = subprocess.run([browser, *flags, page.as_uri()], capture_output=True, timeout=120)
    assert run.returncode == 0 and shot.exists(), run.stderr.decode(errors="replace")[-2000:]
    pixels = matplotlib.image.imread(shot)[..., :3]
    assert pixels.shape[:2] == (2000, 1200)
    non_white = np.mean(np.any(pixels < 0.95, axis=-1))
    assert non_white > 0.05, f"screenshot is nearly blank ({non_white:.2%} non-white pixels)"
    # the browser decoded the embedded heatmap: cividis's top colour is on screen
    top = np.array(matplotlib.colormaps["cividis"](1.0)[:3])
    assert np.sum(np.all(np.abs(pixels - top) < 0.05, axis=-1)) > 2000  # the stripe; the colour bar has < 100
