"""A small HTML reader for the report tests (standard library only)."""

from __future__ import annotations

from html.parser import HTMLParser


class PageReader(HTMLParser):
    """Collects every src/href, every element id, and the text of each table by id."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.links: list[tuple[str, str]] = []   # (attribute, value)
        self.ids: set[str] = set()
        self.tables: dict[str, list[list[str]]] = {}
        self.headers: dict[str, list[str]] = {}
        self.tags: list[str] = []
        self._table: str | None = None
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self._in_head = False

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        for name in ("src", "href"):
            if name in a:
                self.links.append((name, a[name]))
        if tag == "table":
            self._table = a.get("id", "")
            self.tables[self._table] = []
        elif tag == "thead":
            self._in_head = True
        elif tag == "tbody":
            self._in_head = False
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None and self._table is not None:
            if self._in_head:
                self.headers[self._table] = self._row
            else:
                self.tables[self._table].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def read_page(text: str) -> PageReader:
    reader = PageReader()
    reader.feed(text)
    reader.close()
    return reader


def table_dicts(page: PageReader, table_id: str) -> list[dict[str, str]]:
    """Rows of a table as dicts keyed by its header (an "empty" row gives [])."""
    header = page.headers[table_id]
    rows = page.tables[table_id]
    return [dict(zip(header, r)) for r in rows if len(r) == len(header)]
