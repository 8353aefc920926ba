"""The report's document model: sections of tables, figures and text, each rendering to HTML and Markdown.

Every part has ``html()`` (escaped, self-contained: styles come from :mod:`.theme`, figures are inline SVG) and
``markdown()`` (figures linked as ``figures/<name>.png``).  Which parts a section holds is decided by the
section builders; this module only lays them out.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field
from typing import Any

from .. import __version__
from . import theme
from .figures import Rendered

FIGURE_DIR = "figures"


def _esc(text: Any) -> str:
    """Text escaped for HTML (quotes included)."""
    return html.escape(str(text), quote=True)


@dataclass(frozen=True)
class Verdict:
    """A verdict word in a table cell (a bordered word in HTML, never colour alone)."""

    word: str
    note: str = ""

    def html(self) -> str:
        note = f' <span class="footnote">({_esc(self.note)})</span>' if self.note else ""
        return f'<span class="verdict {theme.verdict_class(self.word)}">{_esc(self.word)}</span>{note}'

    def __str__(self) -> str:
        return f"{self.word} ({self.note})" if self.note else self.word


LONG_TABLE = 15    # a table with more rows than this is collapsed in HTML ...
PREVIEW_ROWS = 10  # ... to its first rows, with a toggle showing all of them


@dataclass
class Table:
    """A table whose headers carry units and whose footnotes explain every number.

    In HTML the table scrolls sideways inside its own box when it is wider than the page; its first column
    and its verdict column stay in view while it scrolls (sticky cells).  A table longer than
    :data:`LONG_TABLE` rows shows its first ``preview`` rows (default :data:`PREVIEW_ROWS`; 0 = never
    collapse) and a <details> toggle that shows all of them (plain HTML and CSS, no script; print and
    Markdown always show every row)."""

    caption: str
    headers: list[str]
    rows: list[list[Any]]
    notes: list[str] = field(default_factory=list)
    text: tuple[int, ...] = (0,)
    preview: int | None = None

    def text_columns(self) -> set[int]:
        """Left-aligned columns: the declared text columns and every column holding a verdict."""
        return set(self.text) | self.verdict_columns()

    def verdict_columns(self) -> set[int]:
        """Columns holding a verdict word."""
        return {j for row in self.rows for j, cell in enumerate(row) if isinstance(cell, Verdict)}

    def shown_rows(self) -> int:
        """How many rows the collapsed HTML table shows (all of them when it is not collapsed)."""
        preview = PREVIEW_ROWS if self.preview is None else self.preview
        return preview if 0 < preview < len(self.rows) and len(self.rows) > LONG_TABLE else len(self.rows)

    def _cell_classes(self, j: int, text: set[int], pinned: int | None) -> str:
        names = ["text"] if j in text else []
        if j == 0:
            names.append("pin-start")
        elif j == pinned:
            names.append("pin-end")
        return f' class="{" ".join(names)}"' if names else ""

    def html(self) -> str:
        text = self.text_columns()
        verdicts = self.verdict_columns()
        pinned = max(verdicts) if verdicts else None
        head = "".join(f"<th{self._cell_classes(j, text, pinned)}>{_esc(h)}</th>" for j, h in enumerate(self.headers))
        shown = self.shown_rows()
        body = []
        for i, row in enumerate(self.rows):
            cells = []
            for j, cell in enumerate(row):
                content = cell.html() if isinstance(cell, Verdict) else _esc(cell)
                cells.append(f"<td{self._cell_classes(j, text, pinned)}>{content}</td>")
            more = ' class="more"' if i >= shown else ""
            body.append(f"<tr{more}>" + "".join(cells) + "</tr>")
        notes = "".join(f'<p class="footnote">{_esc(n)}</p>' for n in self.notes)
        toggle = ""
        if shown < len(self.rows):
            toggle = (f'<details class="more"><summary><span class="closed">Show all {len(self.rows)} rows '
                      f'({shown} shown)</span><span class="opened">Show the first {shown} rows only</span>'
                      "</summary></details>")
        return (f'<div class="table"><div class="scroll"><table><caption>{_esc(self.caption)}</caption>'
                f'<thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table></div>{toggle}{notes}</div>')

    def markdown(self) -> str:
        def cell(value: Any) -> str:
            return str(value).replace("|", "\\|").replace("\n", " ")

        text = self.text_columns()
        lines = [f"**{self.caption}**", "", "| " + " | ".join(cell(h) for h in self.headers) + " |",
                 "|" + "|".join("---" if j in text else "---:" for j in range(len(self.headers))) + "|"]
        lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in self.rows]
        return "\n\n".join(["\n".join(lines)] + [f"_{cell(n)}_" for n in self.notes])


@dataclass(frozen=True)
class FigureBlock:
    """A rendered figure with its caption (inline SVG in HTML, the PNG file in Markdown)."""

    rendered: Rendered
    caption: str

    def html(self) -> str:
        name = self.rendered.name
        svg = self.rendered.svg.replace('role="img"', f'role="img" aria-labelledby="caption-{name}"', 1)
        return (f'<figure id="figure-{name}">{svg}'
                f'<figcaption id="caption-{name}">{_esc(self.caption)}</figcaption></figure>')

    def markdown(self) -> str:
        return f"![{self.caption}]({FIGURE_DIR}/{self.rendered.name}.png)"


@dataclass(frozen=True)
class Text:
    """A paragraph; ``kind`` is ``note`` (small print), ``absent`` (a part that was not run), ``deviation`` (a
    departure from the locked analysis plan, shown in red and bold) or ``plain``."""

    text: str
    kind: str = "plain"

    def html(self) -> str:
        cls = f' class="{self.kind}"' if self.kind != "plain" else ""
        return f"<p{cls}>{_esc(self.text)}</p>"

    def markdown(self) -> str:
        if self.kind == "deviation":
            return f"**{self.text}**"
        return f"_{self.text}_" if self.kind != "plain" else self.text


@dataclass(frozen=True)
class Heading:
    """A sub-heading inside a section."""

    text: str

    def html(self) -> str:
        return f"<h3>{_esc(self.text)}</h3>"

    def markdown(self) -> str:
        return f"### {self.text}"


@dataclass(frozen=True)
class Preformatted:
    """Text shown as is, in a fixed-width font (e.g. the tree rule)."""

    text: str

    def html(self) -> str:
        return f"<pre>{_esc(self.text)}</pre>"

    def markdown(self) -> str:
        return "```text\n" + self.text + "\n```"


@dataclass(frozen=True)
class ItemList:
    """A bulleted list (the warnings)."""

    items: tuple[str, ...]

    def html(self) -> str:
        return '<ul class="warnings">' + "".join(f"<li>{_esc(i)}</li>" for i in self.items) + "</ul>"

    def markdown(self) -> str:
        return "\n".join(f"- {i}" for i in self.items)


@dataclass(frozen=True)
class Facts:
    """Label–value pairs (software versions, seeds, fingerprint)."""

    pairs: tuple[tuple[str, str], ...]

    def html(self) -> str:
        return '<dl class="facts">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in self.pairs) + "</dl>"

    def markdown(self) -> str:
        return "\n".join(f"- {k}: `{v}`" for k, v in self.pairs)


@dataclass(frozen=True)
class Caution:
    """The caution box of the methods section."""

    text: str

    def html(self) -> str:
        return f'<aside class="caution"><strong>Caution.</strong> {_esc(self.text)}</aside>'

    def markdown(self) -> str:
        return f"> **Caution.** {self.text}"


@dataclass
class Section:
    """A numbered section: its key (the HTML id), title, two-line reading and parts."""

    key: str
    title: str
    reading: tuple[str, str]
    parts: list[Any]

    def html(self, number: int) -> str:
        reading = "<br>".join(_esc(line) for line in self.reading)
        body = "\n".join(p.html() for p in self.parts)
        return (f'<section class="part" id="{self.key}"><h2><span class="num">{number}</span>{_esc(self.title)}'
                f'<a class="to-top" href="#top" title="back to the top">↑ top</a></h2>\n'
                f'<p class="reading">{reading}</p>\n{body}\n</section>')

    def markdown(self, number: int) -> str:
        blocks = [f"## {number}. {self.title}", "\n".join(f"> {line}  " for line in self.reading)]
        blocks += [p.markdown() for p in self.parts]
        return "\n\n".join(blocks)


@dataclass
class Document:
    """The whole report: title, headline, summary table and sections."""

    title: str
    headline: str
    summary: Table
    sections: list[Section]

    @property
    def figures(self) -> list[Rendered]:
        return [p.rendered for s in self.sections for p in s.parts if isinstance(p, FigureBlock)]

    def html(self) -> str:
        nav = "".join(f'<a href="#{s.key}">{i}. {_esc(s.title)}</a>' for i, s in enumerate(self.sections, 1))
        body = "\n".join(s.html(i) for i, s in enumerate(self.sections, 1))
        return theme.page_head(self.title) + f"""<header class="masthead" id="top">
<div class="kicker">siteproof report · a blind analysis scored against each site's randomization</div>
<h1>{_esc(self.title)}</h1>
<p>{_esc(self.headline)}</p>
</header>
<nav class="contents" aria-label="sections"><a href="#top">top</a>{nav}</nav>
<section class="summary" id="summary">{self.summary.html()}</section>
{body}
<footer>Written by siteproof {_esc(__version__)}. This file is self-contained: its styles and figures are inside it and
it fetches nothing. Figures are also in the folder <code>{FIGURE_DIR}/</code> as SVG and PNG.</footer>
<a class="back-to-top" href="#top">↑ back to top</a>
</body>
</html>
"""

    def markdown(self) -> str:
        blocks = [f"# {self.title}", self.headline, self.summary.markdown()]
        blocks += [s.markdown(i) for i, s in enumerate(self.sections, 1)]
        return "\n\n".join(blocks) + "\n"

