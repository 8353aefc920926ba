"""The report's table rendering: long tables collapse to their first rows behind a <details> toggle in HTML
(never in Markdown), and the name and verdict columns carry the classes that keep them in view."""

from __future__ import annotations

import re

from siteproof.reporting.document import LONG_TABLE, PREVIEW_ROWS, Document, Section, Table, Verdict


def _table(rows: int, **kwargs) -> Table:
    return Table("sites", ["site", "gain", "verdict"], [[f"s{i}", f"{i}.0", Verdict("equivalent")] for i in range(rows)],
                 **kwargs)


def test_a_long_table_shows_its_first_rows_and_a_toggle_for_the_rest():
    html = _table(LONG_TABLE + 5).html()
    assert html.count('<tr class="more">') == LONG_TABLE + 5 - PREVIEW_ROWS
    assert html.count("<tr>") == PREVIEW_ROWS + 1  # the shown rows and the header row
    assert re.search(r'<details class="more"><summary>.*Show all 20 rows \(10 shown\)', html)
    assert len(re.findall(r"^\| s\d+ ", _table(LONG_TABLE + 5).markdown(), re.M)) == LONG_TABLE + 5  # Markdown: all rows


def test_short_tables_and_preview_zero_are_never_collapsed():
    assert "details" not in _table(LONG_TABLE).html()
    assert "details" not in _table(LONG_TABLE + 5, preview=0).html()
    assert _table(LONG_TABLE + 5, preview=3).html().count('<tr class="more">') == LONG_TABLE + 2


def test_name_and_verdict_columns_are_pinned():
    html = _table(3).html()
    assert html.count('class="text pin-start"') == 4  # header and three rows
    assert html.count('class="text pin-end"') == 4


def test_every_section_links_back_to_the_top_of_the_page():
    doc = Document("t", "h", _table(2), [Section("a", "A", ("x", "y"), []), Section("b", "B", ("x", "y"), [])])
    page = doc.html()
    assert 'id="top"' in page and page.count('href="#top"') == 2 + 1 + 1  # two sections, the bar, the float
