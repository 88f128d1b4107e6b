"""The reader's view: the example rendered to HTML and opened in headless Chromium.

The example project is copied to a temporary folder, rendered with ``--to html``
and loaded by Chromium three ways: a screenshot (must not be blank), the DOM
after load (no raw Markdown, no unresolved cross-references, every table and
figure present), and a copy of the page with a small script that reports what
the browser measured (each image decoded; each table's width against the
column it sits in).

Needs the Debian package ``chromium`` (``apt-get install -y chromium``); the
tests skip, saying so, where it is absent.
"""

from __future__ import annotations

import contextlib
import html
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import numpy as np
import pytest

from premises.cli import main

pytestmark = pytest.mark.browser

EXAMPLE = Path(__file__).resolve().parents[1] / "example_project"
LEAVE_BEHIND = shutil.ignore_patterns(
    ".premises", "report-figures", "report.premises.*", "_site", ".quarto", "*.html", "__pycache__"
)
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
WINDOW = (1280, 6000)
PROBE = """<script>
window.addEventListener('load', function () {
  var out = [];
  document.querySelectorAll('img').forEach(function (img) {
    out.push(['img', img.getAttribute('src'), img.naturalWidth, img.naturalHeight].join('\\t'));
  });
  document.querySelectorAll('table').forEach(function (t, i) {
    out.push(['table', i, t.scrollWidth, t.clientWidth].join('\\t'));
  });
  var pre = document.createElement('pre');
  pre.id = 'premises-probe';
  pre.textContent = out.join('\\n');
  document.body.appendChild(pre);
});
</script>
</body>"""


def _chromium(user_data: Path, *args: str) -> subprocess.CompletedProcess[str]:
    assert CHROMIUM is not None
    command = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={user_data}", f"--window-size={WINDOW[0]},{WINDOW[1]}", *args,
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=180, check=False)


class _PageParser(HTMLParser):
    """Images (src, alt), tables and their captions, and the visible text of a page."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.images: list[dict[str, str]] = []
        self.tables = 0
        self.captions: list[str] = []
        self.text: list[str] = []
        self._skip = 0
        self._caption: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in ("script", "style", "title"):
            self._skip += 1
        elif tag == "img":
            self.images.append({k: v or "" for k, v in attrs})
        elif tag == "table":
            self.tables += 1
        elif tag == "caption":
            self._caption = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("script", "style", "title"):
            self._skip -= 1
        elif tag == "caption" and self._caption is not None:
            self.captions.append(" ".join("".join(self._caption).split()))
            self._caption = None

    def handle_data(self, data: str) -> None:
        if self._skip:
            return
        self.text.append(data)
        if self._caption is not None:
            self._caption.append(data)


def _parse(page: str) -> _PageParser:
    parser = _PageParser()
    parser.feed(page)
    parser.close()
    return parser


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    if CHROMIUM is None:
        pytest.skip("headless Chromium is not installed (Debian: apt-get install -y chromium)")
    root = tmp_path_factory.mktemp("browser")
    project = root / "project"
    shutil.copytree(EXAMPLE, project, ignore=LEAVE_BEHIND)
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(["render", str(project / "report.qmd"), "--to", "html", "--json", str(project / "out.json")])
    assert code == 0, err.getvalue()
    html_path = project / "report.premises.html"
    assert html_path.is_file()
    source = html_path.read_text(encoding="utf-8")
    screenshot = root / "page.png"
    shot = _chromium(root / "profile-shot", f"--screenshot={screenshot}", html_path.as_uri())
    dom = _chromium(root / "profile-dom", "--virtual-time-budget=5000", "--dump-dom", html_path.as_uri())
    probe_path = project / "probe.html"
    probe_path.write_text(source.replace("</body>", PROBE, 1), encoding="utf-8")
    probe = _chromium(root / "profile-probe", "--virtual-time-budget=5000", "--dump-dom", probe_path.as_uri())
    found = re.search(r'<pre id="premises-probe">(.*?)</pre>', probe.stdout, flags=re.DOTALL)
    assert found is not None, f"the probe script did not run: {probe.stderr[-2000:]}"
    measured = [line.split("\t") for line in html.unescape(found.group(1)).splitlines() if line]
    return {
        "project": project,
        "html": html_path,
        "source": source,
        "block": json.loads((project / "out.json").read_text(encoding="utf-8"))["blocks"][0],
        "markdown": (project / "report.premises.md").read_text(encoding="utf-8"),
        "screenshot": screenshot,
        "shot": shot,
        "dom": dom.stdout,
        "images": [m for m in measured if m[0] == "img"],
        "tables": [m for m in measured if m[0] == "table"],
    }


def test_screenshot_exists_and_is_not_blank(page: dict[str, Any]) -> None:
    from matplotlib import image

    assert page["screenshot"].is_file(), page["shot"].stderr[-2000:]
    pixels = image.imread(str(page["screenshot"]))
    assert pixels.shape[:2] == (WINDOW[1], WINDOW[0])
    ink = (pixels[..., :3] < 0.9).any(axis=-1)
    assert ink.mean() > 0.02, "the page is (nearly) blank"
    # Content down the whole height (a long report), not only a heading at the top.
    rows = np.flatnonzero(ink.any(axis=1))
    assert rows.min() < 300 and rows.max() > WINDOW[1] - 1000
    # Text throughout, not one block: most 200-pixel bands of the page hold some ink.
    bands = ink[: WINDOW[1] // 200 * 200].reshape(-1, 200, WINDOW[0]).any(axis=(1, 2))
    assert bands.mean() > 0.8


def test_every_figure_resolves_to_a_file_and_decodes_in_the_browser(page: dict[str, Any]) -> None:
    parsed = _parse(page["dom"])
    figures = page["block"]["figures"]
    assert len(parsed.images) == len(figures) >= 6
    for img, figure in zip(parsed.images, figures):
        target = page["html"].parent / unquote(img["src"])
        assert target.is_file(), img["src"]
        assert img["src"] == figure["path"]
        assert img.get("alt", "").strip(), f"{img['src']} has no alt text"
    assert [m[1] for m in page["images"]] == [f["path"] for f in figures]
    for _, src, width, height in page["images"]:
        assert int(width) > 100 and int(height) > 100, f"{src} did not decode in the browser"


def test_every_table_is_present_with_its_caption(page: dict[str, Any]) -> None:
    parsed = _parse(page["dom"])
    expected = re.findall(r"^: (.+?) \{#tbl-[a-z0-9-]+\}$", page["markdown"], flags=re.MULTILINE)
    assert len(expected) >= 6
    assert parsed.tables == len(expected) == len(page["tables"])
    stripped = [re.sub(r"[`*]", "", c) for c in expected]
    for caption, want in zip(parsed.captions, stripped):
        assert caption.endswith(want), (caption, want)


def test_no_raw_markdown_or_unresolved_reference_reaches_the_reader(page: dict[str, Any]) -> None:
    text = " ".join("".join(_parse(page["dom"]).text).split())
    for raw in ("@fig-", "@tbl-", "{#", "![", "](", "|---", "|:--", ":::", "**", "\\|", "{{", "{%"):
        assert raw not in text, f"{raw!r} shows in the page: ...{text[max(0, text.find(raw) - 80):text.find(raw) + 80]}..."
    assert "Figure 1" in text and "Table 1" in text
    # Every cross-reference became a link to an element that exists.
    ids = set(re.findall(r'\bid="([^"]+)"', page["dom"]))
    links = re.findall(r'href="#((?:fig|tbl)-[^"]+)"', page["dom"])
    assert links and set(links) <= ids


def test_no_table_is_wider_than_the_page_column(page: dict[str, Any]) -> None:
    wide = [(int(i), int(scroll), int(client)) for _, i, scroll, client in page["tables"] if int(scroll) > int(client)]
    assert not wide, f"tables that scroll sideways (index, content width, visible width): {wide}"
