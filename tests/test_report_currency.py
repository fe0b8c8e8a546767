"""The plan's currency in every money label of the report (HTML and JSON).

The store is made by really running the runner (tiny ONNX models, invented pages). The HTML is read back
with the standard library's parser, independently of the report code: every cell showing an amount of
money (``data-fmt="money"``) must have the ISO 4217 code in its column head, its row head or itself; every
heading, caption and figure text that names a cost, a price or a budget amount must carry the code.
"""

from __future__ import annotations

import html.parser
import json
import re

import pytest

from _report_support import make_models, make_pages, make_store
from ocrbench.errors import PlanError
from ocrbench.report import PlanRequest, write_report

pytestmark = pytest.mark.slow      # a store and two reports take a few seconds

PLAN = dict(pages=5000, deadline="2d", budget=500.0, workers=1, machines=2, price_core_hour=0.1,
            correction_price_hour=15.0, draws=200)
MONEY_WORDS = re.compile(r"\b(cost(?![- ]model)|price|budget,)", re.I)   # a cost model is not money


class Cells(html.parser.HTMLParser):
    """Table rows as [(tag, text, shows money)], each table's column heads, and every label-like text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: list[dict] = []
        self.labels: list[str] = []         # th, caption, figcaption, svg text
        self._cell: list | None = None
        self._label: list[str] | None = None
        self._label_tag: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table":
            self.tables.append({"head": [], "rows": []})
        elif tag == "tr" and self.tables:
            self.tables[-1]["rows"].append([])
        elif tag in ("th", "td") and self.tables:
            self._cell = [tag, [], False]
        if tag in ("th", "caption", "figcaption", "text") and self._label is None:
            self._label, self._label_tag = [], tag
        if tag == "span" and a.get("data-fmt") == "money" and self._cell is not None:
            self._cell[2] = True

    def handle_endtag(self, tag):
        if tag in ("th", "td") and self._cell is not None and self.tables:
            t = self.tables[-1]
            cell = (self._cell[0], "".join(self._cell[1]).strip(), self._cell[2])
            t["rows"][-1].append(cell) if t["rows"] else None
            self._cell = None
        if tag == "thead" and self.tables and self.tables[-1]["rows"]:
            self.tables[-1]["head"] = [c[1] for c in self.tables[-1]["rows"].pop()]
        if tag == self._label_tag and self._label is not None:
            self.labels.append("".join(self._label).strip())
            self._label = self._label_tag = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell[1].append(data)
        if self._label is not None:
            self._label.append(data)


def money_cells_lacking(text: str, code: str) -> list[str]:
    c = Cells()
    c.feed(text)
    c.close()
    bad, seen = [], 0
    for t in c.tables:
        for row in t["rows"]:
            label = row[0][1] if row and row[0][0] == "th" else ""
            for k, (tag, cell, money) in enumerate(row):
                if not money:
                    continue
                seen += 1
                head = t["head"][k] if k < len(t["head"]) else ""
                if code not in head and code not in label and code not in cell:
                    bad.append(f"cell {cell!r} (column {head!r}, row {label!r})")
    assert seen >= 5, "the report shows amounts of money (compute, correction, total, budget, prices)"
    bad += [f"label {lab!r}" for lab in c.labels if MONEY_WORDS.search(lab) and code not in lab]
    return bad


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    root = tmp_path_factory.mktemp("currency")
    pages = make_pages(root / "pages")
    return root, pages, make_store(pages, list(make_models(root / "models")), root / "run.sqlite")


def test_every_money_label_in_html_and_json_carries_the_currency(store):
    root, pages, db = store
    files = write_report(db, root / "eur", truth=pages, plan=PlanRequest(**PLAN, currency="EUR"), n_boot=100,
                         curve_max_workers=2, table_formats=("csv",))
    text = files.html.read_text(encoding="utf-8")
    assert money_cells_lacking(text, "EUR") == []
    doc = json.loads(files.summary.read_text(encoding="utf-8"))
    plan = doc["plan"]
    assert plan["currency"] == "EUR"
    assert plan["units"]["cost"] == "EUR" and plan["units"]["spec.price_core_hour"] == "EUR per core-hour"
    assert all(r["currency"] == "EUR" for r in plan["rows"].values())
    for key in ("compute_cost", "correction_cost", "cost", "cost_high", "budget"):
        assert key in plan["units"] and plan["units"][key].startswith("EUR")
    # the report's own table of recognisers names the currency of its plan columns
    assert "plan_currency" in (root / "eur" / "tables" / "recognisers.csv").read_text(encoding="utf-8")


def test_without_a_currency_every_money_label_says_so(store):
    root, pages, db = store
    files = write_report(db, root / "none", truth=pages, plan=PlanRequest(**PLAN), n_boot=100, curve_max_workers=2,
                         table_formats=("csv",))
    text = files.html.read_text(encoding="utf-8")
    assert money_cells_lacking(text, "no currency given") == []


def test_two_different_currencies_are_refused(store):
    root, pages, db = store
    with pytest.raises(PlanError, match="GBP.*EUR"):
        write_report(db, root / "two", plan=PlanRequest(**PLAN, currency="GBP"), currency="EUR", n_boot=50,
                     curve_max_workers=2, table_formats=("csv",))


def test_a_budget_with_unpriced_correction_is_never_met_in_the_report(store):
    """Compute priced, correction not: the report never says the budget is met; it says why it cannot judge."""
    root, pages, db = store
    unpriced = {k: v for k, v in PLAN.items() if k != "correction_price_hour"}
    files = write_report(db, root / "unpriced", truth=pages, plan=PlanRequest(**unpriced, currency="EUR"),
                         n_boot=100, curve_max_workers=2, table_formats=("csv",))
    doc = json.loads(files.summary.read_text(encoding="utf-8"))
    rows = doc["plan"]["rows"].values()
    assert rows and all(r["meets_budget"] is None and r["cost"] is None and r["unpriced"] for r in rows)
    c = Cells()
    c.feed(files.html.read_text(encoding="utf-8"))
    budget_cells = []
    for t in c.tables:
        col = [k for k, h in enumerate(t["head"]) if h == "budget"]
        budget_cells += [row[k][1] for row in t["rows"] for k in col if k < len(row)]
        budget_cells += [cell for row in t["rows"] if row and row[0][1] == "meets the budget"
                         for _tag, cell, _m in row[1:]]
    assert len(budget_cells) >= 2 * len(rows)          # the decision table and the side-by-side table
    assert all(cell.startswith("unknown (not priced: review and correction") for cell in budget_cells), budget_cells


def test_the_decision_tables_money_columns_add_up_to_the_total(store):
    # compute + review and correction = total, row by row (as shown, to the cent; the plan's own sum)
    root, pages, db = store
    files = write_report(db, root / "sum", truth=pages, plan=PlanRequest(**PLAN, currency="GBP"), n_boot=100,
                         curve_max_workers=2, table_formats=("csv",))
    c = Cells()
    c.feed(files.html.read_text(encoding="utf-8"))
    c.close()
    table = next(t for t in c.tables if any(h.startswith("review and correction") for h in t["head"]))
    col = {h.split(",")[0]: k for k, h in enumerate(table["head"])}
    amount = lambda cell: float(re.search(r"[\d,]+\.\d\d", cell).group(0).replace(",", ""))  # noqa: E731
    checked = 0
    for row in table["rows"]:
        parts = amount(row[col["compute"]][1]) + amount(row[col["review and correction"]][1])
        assert parts == pytest.approx(amount(row[col["total"]][1]), abs=0.011), row
        checked += 1
    assert checked >= 1
