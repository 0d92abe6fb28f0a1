"""Assembly of the report page: blocks, sections, and the page with its own stylesheet.

Why plain strings: the page is small, static and self-contained; stdlib
`html.escape` on every piece of text is all the safety it needs, and the output
can be read in a text editor. Nothing on the page points outside the file: no
scripts, no web fonts, no links but in-page anchors.
"""

from dataclasses import dataclass, field
from datetime import datetime, timezone
from html import escape

from scaledrill.report.numbers import number

# The order a reader asks in: is the plumbing right (check), where does scaling break
# (ladder, sweep), what would it cost (forecast), and what happened in the incident (run, replay).
QUESTION_ORDER = ("check", "ladder", "sweep", "forecast", "run", "replay")

CSS = """
:root { --ink:#23303b; --paper:#fbf8f2; --rule:#e4ddd0; --teal:#1f7a78; --brick:#b5473a;
        --moss:#6b8e3e; --amber:#d08c2a; --soft:#f3eee4; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.5 Georgia, "Times New Roman", serif; }
header { padding:1.6rem 2rem 1rem; border-bottom:3px double var(--ink); }
header h1 { margin:0; font-size:1.7rem; letter-spacing:.04em; font-variant:small-caps; }
header p { margin:.3rem 0 0; font-size:.9rem; }
nav { margin-top:.6rem; font-size:.88rem; }
nav a { color:var(--teal); margin-right:1.1rem; text-decoration:none; border-bottom:1px dotted var(--teal); }
main { padding:0 2rem 3rem; max-width:76rem; }
section { margin-top:2rem; padding-top:.4rem; border-top:1px solid var(--rule); }
h2 { font-size:1.3rem; margin:.4rem 0 .2rem; }
h2 small { font-weight:normal; font-size:.8rem; font-family:monospace; color:#6a6a6a; }
h3 { font-size:1.05rem; margin:1.2rem 0 .3rem; }
figure { margin:1rem 0; display:inline-block; vertical-align:top; max-width:100%; }
figure img { max-width:100%; border:1px solid var(--rule); }
figcaption { font-size:.82rem; font-style:italic; }
table { border-collapse:collapse; margin:1rem 0; font: 13px/1.35 "DejaVu Sans Mono", monospace; }
caption { text-align:left; font: italic 14px Georgia, serif; padding-bottom:.3rem; }
th, td { padding:.2rem .7rem; border-bottom:1px solid var(--rule); text-align:right; }
th { background:var(--soft); font-weight:bold; }
td:first-child, th:first-child { text-align:left; }
tr.ok td.flag { color:var(--moss); font-weight:bold; }
tr.bad td { background:#f7e3df; }
tr.bad td.flag { color:var(--brick); font-weight:bold; }
tr.pick td { background:#eef3e3; }
.verdict { display:inline-block; padding:.3rem .9rem; margin:.5rem 0; font-weight:bold;
           letter-spacing:.05em; border:2px solid; }
.verdict.good { color:var(--moss); } .verdict.poor { color:var(--brick); }
.caution { border-left:5px solid var(--amber); background:#fbf1df; padding:.6rem 1rem; margin:1rem 0; }
.absent { color:#77726a; font-size:.88rem; }
.summary { margin:1.4rem 0 0; padding:.8rem 1.1rem; background:var(--soft); border:1px solid var(--rule); }
.summary h2 { margin-top:0; }
.summary ol { margin:.2rem 0; padding-left:1.3rem; }
.summary li { margin:.35rem 0; }
.summary a { color:var(--ink); font-weight:bold; }
.tag { display:inline-block; min-width:6.5rem; margin-right:.6rem; padding:0 .4rem; font-size:.8rem;
       font-family:"DejaVu Sans Mono", monospace; border:1px solid; text-align:center; }
.tag.good { color:var(--moss); } .tag.poor { color:var(--brick); } .tag.info { color:var(--teal); }
.note { font-size:.92rem; }
.wide { overflow-x:auto; max-width:100%; }
details { margin:.6rem 0; } summary { cursor:pointer; color:var(--teal); }
"""


FLAG = ' class="flag"'


@dataclass
class Section:
    """One directory's part of the page: an anchor id, a heading and its blocks."""

    kind: str
    title: str
    source: str
    blocks: list[str] = field(default_factory=list)
    id: str = ""
    summary: str = ""  # one plain sentence: the section's answer
    tag: str = ""  # its verdict in a word or two
    good: bool | None = None  # True good news, False bad, None neither


def text(words) -> str:
    return escape(str(words))


def paragraph(words: str, css: str = "") -> str:
    cls = f' class="{css}"' if css else ""
    return f"<p{cls}>{text(words)}</p>"


def heading(words: str) -> str:
    return f"<h3>{text(words)}</h3>"


def figure(uri: str, alt: str, caption: str = "") -> str:
    """An <img> with its data URI and alt text; the caption repeats the alt when not given."""
    return f'<figure><img src="{uri}" alt="{text(alt)}"><figcaption>{text(caption or alt)}</figcaption></figure>'


def cell(value) -> str:
    """Numbers in a short, readable form; None as a dash."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return number(value)
    if isinstance(value, (list, tuple)):
        return ", ".join(cell(v) for v in value)
    return str(value)


def table(caption: str, headers, rows, classes=None, flag_column: int | None = None) -> str:
    """A <table> with a <caption>; `classes` gives each row a CSS class (ok, bad, pick)
    and `flag_column` marks the cell the colour of the verdict goes on."""
    head = "".join(f"<th>{text(h)}</th>" for h in headers)
    body = []
    for i, row in enumerate(rows):
        cls = f' class="{classes[i]}"' if classes and classes[i] else ""
        cells = "".join(
            f"<td{FLAG if j == flag_column else ''}>{text(cell(v))}</td>" for j, v in enumerate(row)
        )
        body.append(f"<tr{cls}>{cells}</tr>")
    rows_html = "".join(body)
    return f"<div class=\"wide\"><table><caption>{text(caption)}</caption><thead><tr>{head}</tr></thead><tbody>{rows_html}</tbody></table></div>"


def key_values(caption: str, mapping: dict) -> str:
    return table(caption, ("key", "value"), [(k, v) for k, v in mapping.items()])


def absent(what: list[str]) -> str:
    """Say what a directory does not hold, instead of leaving a silent gap."""
    return paragraph("Not recorded here: " + ", ".join(what) + ".", "absent") if what else ""


def verdict(good: bool, words: str) -> str:
    return f'<div class="verdict {"good" if good else "poor"}">{text(words)}</div>'


def _slug(words: str) -> str:
    kept = "".join(c if c.isalnum() else "-" for c in words.lower())
    return "-".join(part for part in kept.split("-") if part) or "top"


def assign_ids(sections: list[Section]) -> None:
    """Give every section a unique anchor from its kind and source path."""
    taken: set[str] = set()
    for s in sections:
        base = _slug(f"{s.kind}-{s.source}") if s.source not in ("", ".") else s.kind
        name, n = base, 2
        while name in taken:
            name, n = f"{base}-{n}", n + 1
        s.id = name
        taken.add(name)


def collapsed(label: str, html: str) -> str:
    """Detail a reader opens on demand (plain <details>, no script)."""
    return f"<details><summary>{text(label)}</summary>{html}</details>"


def in_question_order(sections: list[Section]) -> list[Section]:
    """Sections by the reader's question (QUESTION_ORDER), folder order within a kind."""
    rank = {kind: i for i, kind in enumerate(QUESTION_ORDER)}
    return sorted(sections, key=lambda s: rank.get(s.kind, len(rank)))


def summary_block(sections: list[Section]) -> str:
    """One line per section: its verdict tag and its sentence, linked to the section."""
    items = []
    for s in sections:
        css = "info" if s.good is None else "good" if s.good else "poor"
        tag = f'<span class="tag {css}">{text(s.tag or s.kind)}</span>'
        where = f" ({s.source})" if s.source not in ("", ".") else ""
        items.append(f'<li>{tag}<a href="#{s.id}">{text(s.title + where)}</a>: {text(s.summary or "see below.")}</li>')
    return f'<div class="summary" id="summary"><h2>Summary</h2><ol>{"".join(items)}</ol></div>'


def page(title: str, origin: str, sections: list[Section]) -> str:
    """The whole HTML document: the summary first, then every section in question order."""
    sections = in_question_order(sections)
    assign_ids(sections)
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    links = "".join(f'<a href="#{s.id}">{text(s.title)}</a>' for s in sections)
    body = "".join(
        f'<section id="{s.id}"><h2>{text(s.title)} <small>{text(s.source)}</small></h2>{"".join(s.blocks)}</section>'
        for s in sections
    )
    return (
        f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>{text(title)}</title>'
        f"<style>{CSS}</style></head><body><header><h1>{text(title)}</h1>"
        f"<p>From {text(origin)} · written {stamp}</p><nav>{links}</nav></header>"
        f"<main>{summary_block(sections)}{body}</main></body></html>\n"
    )
