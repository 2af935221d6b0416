"""Report blocks and their rendering to Markdown and to a self-contained HTML page.

The HTML page has its style inline and references only files inside the report folder
(``figures/*.png``, ``figures/*.pdf``, ``tables/*``): no external assets, no network.
"""
from __future__ import annotations

import html
from dataclasses import dataclass, field

from ..tables import TextTable, plain_cell, to_markdown

_MINUS = "\u2212"  # typographic minus for asymmetric errors in HTML

__all__ = ["Para", "Items", "Pre", "Links", "Figure", "TableBlock", "Section",
           "to_markdown_page", "to_html_page"]


@dataclass(frozen=True)
class Para:
    """A paragraph of plain text."""

    text: str


@dataclass(frozen=True)
class Items:
    """A bulleted list of plain-text items."""

    items: tuple


@dataclass(frozen=True)
class Pre:
    """Preformatted text (e.g. JSON)."""

    text: str


@dataclass(frozen=True)
class Links:
    """A line of links to files inside the report folder (relative paths)."""

    label: str
    files: tuple


@dataclass(frozen=True)
class Figure:
    """A figure: PNG shown, PDF linked (paths relative to the report folder)."""

    png: str
    pdf: str
    caption: str


@dataclass(frozen=True)
class TableBlock:
    """A table and its written files (paths relative to the report folder)."""

    table: TextTable
    files: tuple


@dataclass(frozen=True)
class Section:
    title: str
    blocks: tuple = field(default=())


# --- Markdown ----------------------------------------------------------------------------

def _md_block(block) -> str:
    if isinstance(block, Para):
        return block.text
    if isinstance(block, Items):
        return "\n".join(f"- {item}" for item in block.items)
    if isinstance(block, Pre):
        return f"```\n{block.text}\n```"
    if isinstance(block, Links):
        return f"{block.label}: " + ", ".join(f"[{f}]({f})" for f in block.files)
    if isinstance(block, Figure):
        return (f"![{block.caption[:60]}]({block.png})\n\n*{block.caption}* "
                f"(vector: [{block.pdf}]({block.pdf}))")
    links = ", ".join(f"[{f.split('/')[-1]}]({f})" for f in block.files)
    return to_markdown(block.table) + f"\nFiles: {links}"


def to_markdown_page(title: str, sections) -> str:
    """The report as Markdown."""
    parts = [f"# {title}"]
    for sec in sections:
        parts.append(f"## {sec.title}")
        parts += [_md_block(b) for b in sec.blocks]
    return "\n\n".join(parts) + "\n"


# --- HTML --------------------------------------------------------------------------------

_CSS = """
body { font-family: sans-serif; max-width: 60em; margin: 2em auto; padding: 0 1em;
       color: #111; line-height: 1.4; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 0.9em; }
th, td { border-bottom: 1px solid #bbb; padding: 0.2em 0.6em; text-align: left; }
caption { caption-side: top; font-weight: bold; text-align: left; }
figure { margin: 1em 0; }
figure img { max-width: 100%; }
figcaption, .notes, .files { font-size: 0.9em; color: #333; }
pre { background: #f4f4f4; padding: 0.6em; overflow-x: auto; font-size: 0.85em; }
"""


def _html_table(block: TableBlock) -> str:
    t, e = block.table, html.escape
    head = "".join(f"<th>{e(c.label)}{' (' + e(c.unit) + ')' if c.unit else ''}</th>"
                   for c in t.columns)
    rows = "".join("<tr>" + "".join(f"<td>{e(plain_cell(c, minus=_MINUS))}</td>" for c in r) + "</tr>"
                   for r in t.rows)
    notes = "".join(f"<p class=\"notes\">{e(n)}</p>" for n in t.notes)
    links = ", ".join(f"<a href=\"{e(f)}\">{e(f.split('/')[-1])}</a>" for f in block.files)
    return (f"<table><caption>{e(t.caption)}</caption><thead><tr>{head}</tr></thead>"
            f"<tbody>{rows}</tbody></table>{notes}<p class=\"files\">Files: {links}</p>")


def _html_block(block) -> str:
    e = html.escape
    if isinstance(block, Para):
        return f"<p>{e(block.text)}</p>"
    if isinstance(block, Items):
        return "<ul>" + "".join(f"<li>{e(str(i))}</li>" for i in block.items) + "</ul>"
    if isinstance(block, Pre):
        return f"<pre>{e(block.text)}</pre>"
    if isinstance(block, Links):
        links = ", ".join(f"<a href=\"{e(f)}\">{e(f)}</a>" for f in block.files)
        return f"<p>{e(block.label)}: {links}</p>"
    if isinstance(block, Figure):
        return (f"<figure><img src=\"{e(block.png)}\" alt=\"{e(block.caption[:80])}\">"
                f"<figcaption>{e(block.caption)} <a href=\"{e(block.pdf)}\">PDF</a>"
                "</figcaption></figure>")
    return _html_table(block)


def to_html_page(title: str, sections) -> str:
    """The report as one HTML page (inline style, relative links only)."""
    e = html.escape
    body = [f"<h1>{e(title)}</h1>"]
    for sec in sections:
        body.append(f"<h2>{e(sec.title)}</h2>")
        body += [_html_block(b) for b in sec.blocks]
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")
