"""A small reader of the console's HTML (standard library ``html.parser``): tables, images, forms, text."""

from __future__ import annotations

from html.parser import HTMLParser


class Page(HTMLParser):
    """``rows[table_id]``: the body rows of each table (each a list of cell texts); ``images``: img src
    values; ``forms``: (method, action) pairs; ``text``: all visible text joined by spaces."""

    def __init__(self, html: str) -> None:
        super().__init__()
        self.rows: dict[str, list[list[str]]] = {}
        self.images: list[str] = []
        self.forms: list[tuple[str, str]] = []
        self._chunks: list[str] = []
        self._table: str | None = None
        self._in_body = False
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self.feed(html)
        self.close()
        self.text = " ".join(" ".join(self._chunks).split())

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        if tag == "table":
            self._table = attributes.get("id", "")
            self.rows.setdefault(self._table, [])
        elif tag == "tbody":
            self._in_body = True
        elif tag == "tr" and self._in_body:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "img":
            self.images.append(attributes.get("src", ""))
        elif tag == "form":
            self.forms.append((attributes.get("method", "get").lower(), attributes.get("action", "")))

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append(" ".join(" ".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.rows[self._table].append(self._row)
            self._row = None
        elif tag == "tbody":
            self._in_body = False
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        self._chunks.append(data)
        if self._cell is not None:
            self._cell.append(data)
