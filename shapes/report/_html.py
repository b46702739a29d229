"""The HTML page of a report: the Markdown the reports write made into one static page, plots embedded
as base64 PNG and style inline, so it opens from disk with no network."""

from __future__ import annotations

import base64
import html
import os
import re
from pathlib import Path

from shapes._atomic import write_text

__all__ = ["markdown_to_html", "write_report"]

_STYLE = """
body { font-family: sans-serif; max-width: 96rem; margin: 2rem auto; padding: 0 1rem; color: #1b1b1b; line-height: 1.45; }
table { border-collapse: collapse; margin: 0.8rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #c8c8c8; padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
td { white-space: nowrap; }
.wide { overflow-x: auto; }
th { background: #eef1f4; }
tr:nth-child(even) td { background: #f8f9fa; }
code { background: #f1f1f1; padding: 0 0.2rem; border-radius: 3px; }
img { max-width: 100%; display: block; margin: 0.8rem 0; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.2rem; margin-top: 2rem; } h3 { font-size: 1.05rem; }
"""

_INLINE = re.compile(r"`([^`]+)`|\*\*([^*]+)\*\*|\*([^*]+)\*|\[([^\]]+)\]\(([^)\s]+)\)")


def _inline(text: str) -> str:
    """Escape ``text`` and turn the inline Markdown the reports use (code, bold, emphasis, links) into HTML."""
    out, last = [], 0
    for m in _INLINE.finditer(text):
        out.append(html.escape(text[last:m.start()]))
        code, bold, em, label, href = m.groups()
        if code is not None:
            out.append(f"<code>{html.escape(code)}</code>")
        elif bold is not None:
            out.append(f"<strong>{_inline(bold)}</strong>")
        elif em is not None:
            out.append(f"<em>{_inline(em)}</em>")
        else:
            if href.endswith(".md") and "://" not in href:
                href = href[:-3] + ".html"  # a report links its sibling reports' pages
            out.append(f'<a href="{html.escape(href)}">{_inline(label)}</a>')
        last = m.end()
    out.append(html.escape(text[last:]))
    return "".join(out)


def _cells(line: str) -> list[str]:
    return [c.strip() for c in line.strip().strip("|").split("|")]


def _image(alt: str, src: str, base: Path) -> str:
    """An ``<img>`` with the PNG inlined as a data URI; a missing file becomes a line of text."""
    path = base / src
    if not path.is_file():
        return f"<p>(plot {html.escape(src)} is missing)</p>"
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def markdown_to_html(text: str, base: str | os.PathLike, title: str | None = None) -> str:
    """One self-contained HTML page from the Markdown the reports write.

    Handles what they use: ``#`` headings, paragraphs, pipe tables (a header row, then a ``|---|``
    row), ``- `` lists, images on a line of their own (embedded from ``base`` as base64 PNG), and
    inline code, bold, emphasis and links (a link to a sibling ``.md`` points at its ``.html``).
    """
    base = Path(base)
    lines = text.splitlines()
    body: list[str] = []
    paragraph: list[str] = []

    def flush() -> None:
        if paragraph:
            body.append(f"<p>{_inline(' '.join(paragraph))}</p>")
            paragraph.clear()

    i = 0
    while i < len(lines):
        line = lines[i].rstrip()
        image = re.fullmatch(r"!\[([^\]]*)\]\(([^)\s]+)\)", line.strip())
        if not line.strip():
            flush()
        elif line.startswith("#"):
            flush()
            level = min(len(line) - len(line.lstrip("#")), 6)
            body.append(f"<h{level}>{_inline(line[level:].strip())}</h{level}>")
        elif image:
            flush()
            body.append(_image(image.group(1), image.group(2), base))
        elif line.startswith("|") and i + 1 < len(lines) and re.fullmatch(r"\|?[\s:|-]+\|?", lines[i + 1].strip()):
            flush()
            rows = ["<tr>" + "".join(f"<th>{_inline(c)}</th>" for c in _cells(line)) + "</tr>"]
            i += 2
            while i < len(lines) and lines[i].strip().startswith("|"):
                rows.append("<tr>" + "".join(f"<td>{_inline(c)}</td>" for c in _cells(lines[i])) + "</tr>")
                i += 1
            body.append('<div class="wide"><table>\n' + "\n".join(rows) + "\n</table></div>")
            continue
        elif line.lstrip().startswith("- "):
            flush()
            items = []
            while i < len(lines) and lines[i].lstrip().startswith("- "):
                items.append(f"<li>{_inline(lines[i].lstrip()[2:].strip())}</li>")
                i += 1
            body.append("<ul>\n" + "\n".join(items) + "\n</ul>")
            continue
        else:
            paragraph.append(line.strip())
        i += 1
    flush()
    if title is None:
        first = next((ln for ln in lines if ln.startswith("# ")), "# report")
        title = re.sub(r"[`*]", "", first[2:]).strip()
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{html.escape(title)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")


def write_report(path: str | os.PathLike, text: str) -> Path:
    """Write the Markdown report ``path`` and, beside it, the same content as a static HTML page
    (same name, ``.html``) with its plots embedded. Returns the Markdown path."""
    path = Path(path)
    write_text(path.with_suffix(".html"), markdown_to_html(text, path.parent))
    return write_text(path, text)
