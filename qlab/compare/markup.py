"""The small Markdown subset the report writes, turned into one self-contained HTML page.

Blocks: ``#``/``##``/``###`` headings, pipe tables (header, separator, rows), ``- `` lists
(indented items nest one level),
``> `` notes, a line holding only ``![alt](file.png)`` (embedded as a base64 PNG read from
``figure_dir``) and paragraphs. Inline: ``**bold**``, ```code``` and links ``[text](url)``; a
link to a local ``.md`` page points at its ``.html`` page instead (the report writes both).
Everything else is text, escaped.
"""

from __future__ import annotations

import base64
import html
import re
from pathlib import Path
from urllib.parse import urlsplit

_IMAGE = re.compile(r"^!\[(?P<alt>[^\]]*)\]\((?P<src>[^)\s]+)\)$")
_BOLD = re.compile(r"\*\*(.+?)\*\*")
# a code span, or a link outside one (not an image): ``[text](url)``
_SPAN = re.compile(r"`(?P<code>[^`]+)`|(?<!!)\[(?P<text>[^\[\]]+)\]\((?P<url>[^()\[\]\s]+)\)")
_ANCHOR = "<a>"  # an anchor before its href is filled in (escaped text never holds a bare "<")
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


def _href(url: str) -> str:
    """The link target as an escaped attribute value; a local ``.md`` page becomes its ``.html`` page."""
    parts = urlsplit(url)
    if not parts.scheme and not parts.netloc and parts.path.lower().endswith(".md"):
        url = parts._replace(path=parts.path[:-3] + ".html").geturl()
    return html.escape(url, quote=True)


def _spans(text: str, hrefs: list[str]) -> str:
    """``text`` escaped, with code spans, and links as bare anchors whose targets are appended to ``hrefs``."""
    out, end = [], 0
    for m in _SPAN.finditer(text):
        out.append(html.escape(text[end : m.start()], quote=False))
        if m["code"] is not None:
            out.append(f"<code>{html.escape(m['code'], quote=False)}</code>")
        else:
            hrefs.append(_href(m["url"]))
            out.append(f"{_ANCHOR}{_spans(m['text'], hrefs)}</a>")  # link text holds no link: no brackets
        end = m.end()
    return "".join([*out, html.escape(text[end:], quote=False)])


def _inline(text: str) -> str:
    hrefs: list[str] = []
    out = _BOLD.sub(r"<strong>\1</strong>", _spans(text, hrefs))
    pieces = out.split(_ANCHOR)  # hrefs go in after bold, so no ``**`` inside a URL is read as bold
    return pieces[0] + "".join(f'<a href="{h}">{p}' for h, p in zip(hrefs, pieces[1:], strict=True))


def _cells(line: str) -> list[str]:
    return [c.strip() for c in line.strip().strip("|").split("|")]


def _table(lines: list[str]) -> str:
    head = "".join(f"<th>{_inline(c)}</th>" for c in _cells(lines[0]))
    body = "".join("<tr>" + "".join(f"<td>{_inline(c)}</td>" for c in _cells(row)) + "</tr>" for row in lines[2:])
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _image(alt: str, src: str, figure_dir: Path) -> str:
    path = figure_dir / src
    if path.suffix.lower() != ".png" or not path.is_file():
        raise ValueError(f"image {src!r} must be a PNG file in {str(figure_dir)!r}")
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<figure><img alt="{html.escape(alt)}" src="data:image/png;base64,{data}"></figure>'


def _blocks(lines: list[str]) -> list[list[str]]:
    """Group lines into blocks: consecutive lines of the same kind, split at blank lines."""
    blocks: list[list[str]] = []
    kind = None
    for line in lines:
        stripped = line.strip()
        if not stripped:
            kind = None
            continue
        this = "table" if stripped.startswith("|") else "list" if stripped.startswith("- ") else (
            "note" if stripped.startswith(">") else "single" if stripped.startswith("#") or _IMAGE.match(stripped)
            else "text")
        keep = line.rstrip() if this == "list" else stripped  # list items keep their indent (nesting)
        if this == kind and this != "single":
            blocks[-1].append(keep)
        else:
            blocks.append([keep])
        kind = this
    return blocks


def _list(block: list[str]) -> str:
    """A list; indented items nest under the item before them (one level)."""
    out, nested = ["<ul>"], False
    for line in block:
        indented = line.startswith(" ")
        if indented and not nested:
            out[-1] = out[-1].removesuffix("</li>")
            out.append("<ul>")
        elif nested and not indented:
            out.append("</ul></li>")
        nested = indented
        out.append(f"<li>{_inline(line.strip()[2:])}</li>")
    return "".join([*out, "</ul></li>" if nested else "", "</ul>"])


def _block_html(block: list[str], figure_dir: Path) -> str:
    first = block[0].lstrip()
    heading = re.match(r"^(#{1,3})\s+(.*)$", first)
    if heading:
        level = len(heading.group(1))
        return f"<h{level}>{_inline(heading.group(2))}</h{level}>"
    image = _IMAGE.match(first)
    if image:
        return _image(image.group("alt"), image.group("src"), figure_dir)
    if first.startswith("|") and len(block) >= 2:
        return _table(block)
    if first.startswith("- "):
        return _list(block)
    if first.startswith(">"):
        return "<blockquote>" + "<br>".join(_inline(line.lstrip("> ")) for line in block) + "</blockquote>"
    return "<p>" + " ".join(_inline(line) for line in block) + "</p>"


def markdown_to_html(markdown: str, title: str, figure_dir: Path) -> str:
    """One HTML page for ``markdown``; its images are read from ``figure_dir`` and embedded."""
    body = "\n".join(_block_html(b, Path(figure_dir)) for b in _blocks(markdown.splitlines()))
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n<title>{html.escape(title)}</title>\n'
            f"<style>{_STYLE}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")
