"""Markdown of the report: names written as literal text, and a page turned into one self-contained HTML file.

:func:`md_literal` escapes a name (run folder, learner, arm, config value, task-setting label)
where it enters ``report.md``, so it reads as the text it is in any CommonMark renderer.
:func:`markdown_to_html` renders with the ``markdown`` package and its ``tables`` extension, with
three guarantees of its own: raw HTML in the Markdown is shown as text, never as tags; a link keeps
its target only when it is a relative path or an http(s) URL (a local ``.md`` page points at its
``.html`` page, which the report writes beside it); and every image is a PNG in the figure folder,
embedded as a base64 data URI, so the page needs no other file. Emphasis is ``**bold**`` only (the
report writes no other), so a lone star, as in ``V*(s0)``, stays a star.
"""

from __future__ import annotations

import base64
import html
import re
import string
from pathlib import Path
from xml.etree.ElementTree import Element

import markdown
from markdown.inlinepatterns import SimpleTagInlineProcessor
from markdown.treeprocessors import Treeprocessor

# control characters (and line separators), shown as their escape sequence: "\n" reads as \n
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029]")
# characters that start inline markup anywhere; "_" only at a word's edge (inside a word it is literal)
_MARKUP = re.compile(r"[\\`*\[\]<>!|~#]|(?<![^\W_])_|_(?![^\W_])")
# an "&" that starts something read as a character reference (a bare "&" is literal)
_AMPERSAND = re.compile(r"&(?=#?[0-9A-Za-z]+;)")
# what starts a block (list item, setext underline, numbered item) at the very beginning of a name
_LEADING = re.compile(r"^(?:[+\-=]|\d+[.)])")
# a character reference the serializer keeps as it is, so the browser decodes it in an attribute
_REFERENCE = re.compile(r"&(?:#[0-9]+|#[xX][0-9a-fA-F]+|[0-9A-Za-z]+);")
_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 1100px; margin: 2em auto; padding: 0 1em; color: #222;
       line-height: 1.45; }
h1 { font-size: 1.6em; border-bottom: 2px solid #333; padding-bottom: .2em; }
h2 { font-size: 1.25em; margin-top: 1.8em; border-bottom: 1px solid #ccc; }
h3 { font-size: 1.05em; }
table { border-collapse: collapse; margin: .8em 0; font-size: .88em; }
th, td { border: 1px solid #d0d0d0; padding: .25em .6em; text-align: right; }
th { background: #f3f3f3; }
td:first-child, th:first-child, td:nth-child(2), th:nth-child(2) { text-align: left; }
blockquote { margin: .8em 0; padding: .4em .9em; background: #fff6e0; border-left: 4px solid #e0a000; }
img { max-width: 100%; }
code { background: #f3f3f3; padding: 0 .2em; }
"""


def md_literal(value: object, code: bool = False) -> str:
    """``value`` as Markdown that shows exactly its text: markup characters backslash-escaped, and an
    ``&`` that would start a character reference written as ``&amp;``.

    With ``code=True`` it is set as a code span when it can be (no backtick, pipe or control
    character, no space at either end), else escaped as plain text. Control characters show as
    their escape sequence (a newline as ``\\n``), so a name never breaks a line or a table row.
    """
    text = _CONTROL.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"), str(value))
    if code and text and text.strip() == text and not re.search(r"[`|]", text):
        return f"`{text}`"
    text = _MARKUP.sub(lambda m: "\\" + m.group(), _AMPERSAND.sub("&amp;", text))
    return _LEADING.sub(lambda m: m.group()[:-1] + "\\" + m.group()[-1], text)


def _relative(url: str) -> bool:
    """A relative path (or fragment or query): no scheme, no host, not rooted at ``/``."""
    return not url.startswith(("/", "\\")) and ":" not in re.split(r"[/?#]", url, maxsplit=1)[0]


def _safe_target(href: str) -> str | None:
    """The link target to keep: ``href`` if relative or http(s) (a local ``.md`` page as its ``.html``), else None.

    The check reads the target as a browser will, after the character references the HTML keeps
    are decoded and the tabs, newlines and edge spaces a browser drops are dropped.
    """
    seen = _REFERENCE.sub(lambda m: html.unescape(m.group()), href)
    seen = re.sub(r"[\t\n\r]", "", seen).strip("".join(map(chr, range(33))))
    if re.match(r"https?:", seen, re.IGNORECASE):
        return href
    if not _relative(seen):
        return None
    path, rest = re.fullmatch(r"([^?#]*)(.*)", href, re.DOTALL).groups()
    return path[:-3] + ".html" + rest if path.lower().endswith(".md") else href


class _ReportPage(Treeprocessor):
    """Keeps only safe link targets and embeds every image (a PNG in ``figure_dir``) as a data URI."""

    def __init__(self, md: markdown.Markdown, figure_dir: Path):
        super().__init__(md)
        self.figure_dir = figure_dir

    def run(self, root: Element) -> None:
        for anchor in root.iter("a"):
            target = _safe_target(anchor.get("href", ""))
            if target is None:
                anchor.attrib.pop("href", None)
            else:
                anchor.set("href", target)
        for image in root.iter("img"):
            image.set("src", self._embedded(image.get("src", "")))

    def _embedded(self, src: str) -> str:
        folder = self.figure_dir.resolve()
        path = (folder / src).resolve() if _relative(src) else None
        if path is None or path.suffix.lower() != ".png" or not path.is_file() or not path.is_relative_to(folder):
            raise ValueError(f"image {src!r} must be a PNG file in {str(self.figure_dir)!r}")
        return "data:image/png;base64," + base64.b64encode(path.read_bytes()).decode("ascii")


def markdown_to_html(text: str, title: str, figure_dir: Path) -> str:
    """One HTML page for the Markdown ``text``; its images are read from ``figure_dir`` and embedded."""
    md = markdown.Markdown(extensions=["tables"], output_format="html")
    md.preprocessors.deregister("html_block")  # raw HTML stays text
    md.inlinePatterns.deregister("html")
    md.inlinePatterns.deregister("em_strong")  # emphasis: **bold** only, so a star as in "V*(s0) ... Q*" stays a star
    md.inlinePatterns.register(SimpleTagInlineProcessor(r"(\*{2})(.+?)\1", "strong"), "strong", 60)
    md.ESCAPED_CHARS = sorted(set(md.ESCAPED_CHARS) | set(string.punctuation))  # CommonMark: any ASCII punctuation
    md.treeprocessors.register(_ReportPage(md, Path(figure_dir)), "qlab_report_page", -10)  # after unescaping
    body = md.convert(text)
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n<title>{html.escape(title)}</title>\n'
            f"<style>{_STYLE}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")
