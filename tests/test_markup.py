"""report.md to report.html: names stay text, links keep only relative and http(s) targets, figures are embedded.

Pages are read back with the standard library's HTML parser (``html.parser``), which decodes
character references as the HTML standard says a browser does, so the tests see what a browser
would follow; link targets are then split with ``urllib.parse.urlsplit``.
"""

from __future__ import annotations

import base64
import io
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from PIL import Image

from qlab.compare.markup import markdown_to_html, md_literal

VOID = {"meta", "img", "br", "hr"}  # HTML elements without an end tag


class Page(HTMLParser):
    """The elements of a page's body in document order: (tag, attributes, text inside)."""

    def __init__(self, page: str) -> None:
        super().__init__(convert_charrefs=True)
        self.elements: list[tuple[str, dict[str, str | None], list[str]]] = []
        self.open: list[tuple[str, dict[str, str | None], list[str]]] = []
        self.in_body = False
        self.feed(page)
        self.close()

    def handle_starttag(self, tag, attrs):
        if tag == "body":
            self.in_body = True
        elif self.in_body:
            element = (tag, dict(attrs), [])
            self.elements.append(element)
            if tag not in VOID:
                self.open.append(element)

    def handle_endtag(self, tag):
        if tag == "body":
            self.in_body = False
        elif self.in_body:
            name, _, _ = self.open.pop()
            assert name == tag  # properly nested

    def handle_data(self, data):
        for _, _, text in self.open:
            text.append(data)

    def tags(self) -> set[str]:
        return {tag for tag, _, _ in self.elements}

    def find(self, tag: str) -> list[tuple[dict[str, str | None], str]]:
        return [(attrs, "".join(text)) for t, attrs, text in self.elements if t == tag]


def render(text: str, folder: Path) -> Page:
    return Page(markdown_to_html(text, "test page", folder))


# (name, the text it must show): control characters show as their escape sequence
NAMES = [
    ("<script>alert(1)</script>", "<script>alert(1)</script>"),
    ("<img src=x onerror=alert(1)>", "<img src=x onerror=alert(1)>"),
    ("[x](javascript:alert(1))", "[x](javascript:alert(1))"),
    ("![y](y.png)", "![y](y.png)"),
    ("*em* **strong** _em_ __strong__ ~~gone~~", "*em* **strong** _em_ __strong__ ~~gone~~"),
    ("a|b", "a|b"),
    ("tick`tock", "tick`tock"),
    ("&amp; &lt;b&gt; &#106; &#x6a;", "&amp; &lt;b&gt; &#106; &#x6a;"),
    ("AT&T &copy", "AT&T &copy"),
    ("<https://example.org>", "<https://example.org>"),
    ("# not a heading", "# not a heading"),
    ("1. not a list", "1. not a list"),
    ("2) not a list either", "2) not a list either"),
    ("+ nor this", "+ nor this"),
    ("- not a list", "- not a list"),
    ("> not a quote", "> not a quote"),
    ("back\\slash \\*", "back\\slash \\*"),
    ("line\nbreak\ttab", "line\\nbreak\\ttab"),
    ("learner.step_size.start=0.2", "learner.step_size.start=0.2"),
]


@pytest.mark.parametrize(("name", "shown"), NAMES, ids=[repr(n) for n, _ in NAMES])
def test_a_name_shows_as_its_own_text_wherever_the_report_writes_it(name, shown, tmp_path):
    text = "\n".join([
        f"# Comparison report: {md_literal(name)}", "",
        f"- **{md_literal(name)}**: {md_literal(name, code=True)} learns fastest", "",
        "| learner | arm | runs |", "|---|---|---|", f"| {md_literal(name)} | {md_literal(name, code=True)} | 3 |", "",
    ])
    page = render(text, tmp_path)
    assert page.tags() <= {"h1", "ul", "li", "strong", "code", "table", "thead", "tbody", "tr", "th", "td"}
    assert page.find("h1") == [({}, f"Comparison report: {shown}")]
    assert page.find("strong") == [({}, shown)]
    assert page.find("li") == [({}, f"{shown}: {shown} learns fastest")]
    assert [cell for _, cell in page.find("td")] == [shown, shown, "3"]  # a "|" in a name splits no cell


def test_raw_html_in_the_markdown_stays_text(tmp_path):
    text = ("<script>alert(1)</script>\n\n<div onclick=alert(1)>block</div>\n\n"
            "inline <b>bold</b> <img src=x onerror=alert(1)> <!-- comment -->\n")
    page = render(text, tmp_path)
    assert page.tags() == {"p"}
    assert [t for _, t in page.find("p")] == ["<script>alert(1)</script>", "<div onclick=alert(1)>block</div>",
                                              "inline <b>bold</b> <img src=x onerror=alert(1)> <!-- comment -->"]


KEPT = [
    ("sub/report.md", "sub/report.html"),
    ("../report.md#summary", "../report.html#summary"),
    ("page.md?a=1&b=2", "page.html?a=1&b=2"),
    ("#summary", "#summary"),
    ("curves_success.png", "curves_success.png"),
    ("https://example.org/notes.md", "https://example.org/notes.md"),  # not a local page: left as it is
    ("HTTP://example.org/a?b=1", "HTTP://example.org/a?b=1"),
]
DROPPED = [
    "javascript:alert(1)",
    "JaVaScRiPt:alert(1)",
    "<javascript:alert(1)>",
    "&#106;avascript:alert(1)",  # a character reference the browser decodes in the attribute
    "java&#x09;script:alert(1)",  # a tab, which the browser drops from a URL
    "&#x20;javascript:alert(1)",  # a leading space, likewise
    "data:text/html;base64,PHNjcmlwdD5hbGVydCgxKTwvc2NyaXB0Pg==",
    "file:///etc/passwd",
    "vbscript:msgbox(1)",
    "mailto:someone@example.org",
    "//example.org/x",  # no scheme but a host: follows the page's own scheme, file: when opened from disk
    "/etc/passwd",
]


def test_links_keep_only_relative_and_http_targets(tmp_path):
    targets = [t for t, _ in KEPT] + DROPPED
    text = "\n".join(f"- [link {i}]({t})" for i, t in enumerate(targets))
    text += "\n- [reference][r], <ftp://example.org/x> and <https://example.org/y>\n\n[r]: javascript:alert(3)\n"
    anchors = render(text, tmp_path).find("a")
    assert [t for _, t in anchors] == [f"link {i}" for i in range(len(targets))] + [
        "reference", "ftp://example.org/x", "https://example.org/y"]
    hrefs = [attrs.get("href") for attrs, _ in anchors]
    assert hrefs[: len(KEPT)] == [h for _, h in KEPT]
    assert hrefs[len(KEPT) :] == [None] * (len(DROPPED) + 2) + ["https://example.org/y"]
    for href in filter(None, hrefs):
        # urllib.parse.urlsplit: what is kept is relative (no scheme, no host) or an http(s) URL
        parts = urlsplit(href)
        assert parts.scheme.lower() in {"http", "https"} or (not parts.scheme and not parts.netloc)


def test_links_of_the_old_renderer_still_point_at_html_pages_and_are_escaped(tmp_path):
    text = ('- [A & <b> "c"](sub/report.md): x < y & z\n'
            "- back to [the study](../report.md#summary), [a query](page.md?a=1&b=2) and "
            "[elsewhere](https://example.org/notes.md)\n"
            "- `[not a link](x.md)` and **[bold](y.md)** and [no bold](a**b**.md)\n")
    page = render(text, tmp_path)
    assert [(a.get("href"), t) for a, t in page.find("a")] == [
        ("sub/report.html", 'A & <b> "c"'), ("../report.html#summary", "the study"),
        ("page.html?a=1&b=2", "a query"), ("https://example.org/notes.md", "elsewhere"),
        ("y.html", "bold"), ("a**b**.html", "no bold")]
    assert [t for _, t in page.find("code")] == ["[not a link](x.md)"]
    assert [t for _, t in page.find("strong")] == ["bold"]
    assert "b" not in page.tags()
    assert page.find("li")[0][1] == 'A & <b> "c": x < y & z'


def test_a_lone_star_stays_a_star(tmp_path):
    text = "the policy loss V*(s0) - V^pi(s0), the best fit of Q* and **bold**\n"
    page = render(text, tmp_path)
    assert page.tags() == {"p", "strong"}
    assert page.find("p") == [({}, "the policy loss V*(s0) - V^pi(s0), the best fit of Q* and bold")]


def test_figures_are_embedded_as_png_data(tmp_path):
    figures = tmp_path / "report"
    figures.mkdir()
    Image.new("RGB", (3, 2), (200, 30, 10)).save(figures / "curves.png")
    page = render("Curves:\n\n![curves](curves.png)\n", figures)
    [(attrs, _)] = page.find("img")
    assert attrs["alt"] == "curves"
    head, data = attrs["src"].split(",", 1)
    assert head == "data:image/png;base64"
    assert base64.b64decode(data) == (figures / "curves.png").read_bytes()
    with Image.open(io.BytesIO(base64.b64decode(data))) as decoded:  # Pillow reads it back as the PNG it is
        assert (decoded.format, decoded.size) == ("PNG", (3, 2))


@pytest.mark.parametrize("src", [
    "missing.png", "../outside.png", "notes.txt", "data:image/png;base64,iVBORw0KGgo=",
    "https://example.org/figure.png", "file:///etc/figure.png", "/tmp/figure.png", "javascript:alert(1)",
])
def test_only_png_files_in_the_figure_folder_are_images(src, tmp_path):
    figures = tmp_path / "report"
    figures.mkdir()
    Image.new("RGB", (2, 2)).save(tmp_path / "outside.png")
    (figures / "notes.txt").write_text("not a figure")
    with pytest.raises(ValueError, match="must be a PNG file"):
        markdown_to_html(f"![figure]({src})\n", "test page", figures)
