"""The self-contained HTML field report and the batch index, built from the demo run."""

from __future__ import annotations

import base64
import copy
import hashlib
import json
import re
import shutil
from html.parser import HTMLParser
from urllib.parse import quote, unquote

import pytest

from pmap.report.html import write_batch_index, write_field_report

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
HOSTILE = '<script>alert("x")</script> & Sons\' "Field"'


class Page(HTMLParser):
    """Collects what the checks need: every tag's attributes, table cells and text."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.ids: list[str] = []
        self.text_parts: list[str] = []
        self.tables: dict[str, list[tuple[dict[str, str], list[dict[str, str]]]]] = {}
        self._table: str | None = None
        self._section: str | None = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        attrs = {k: (v if v is not None else "") for k, v in attrs}
        self.tags.append((tag, attrs))
        if "id" in attrs:
            self.ids.append(attrs["id"])
        if tag == "table":
            self._table = attrs.get("id", "")
            self.tables[self._table] = []
        elif tag in ("thead", "tbody", "tfoot") and self._table is not None:
            self._section = tag
        elif tag == "tr" and self._table is not None:
            self.tables[self._table].append(({**attrs, "_in": self._section or ""}, []))
        elif tag in ("td", "th") and self._table is not None and self.tables[self._table]:
            self.tables[self._table][-1][1].append(attrs)

    def handle_endtag(self, tag):
        if tag == "table":
            self._table = None
            self._section = None

    def handle_data(self, data):
        self.text_parts.append(data)

    @property
    def text(self) -> str:
        return re.sub(r"\s+", " ", "".join(self.text_parts))

    def attr_values(self, name: str) -> list[str]:
        return [a[name] for _, a in self.tags if name in a]

    def rows(self, table_id: str, section: str = "tbody") -> list[tuple[dict, dict[str, str]]]:
        """(row attributes, {data-key: data-value}) for the rows of one table section."""
        return [(attrs, {c["data-key"]: c["data-value"] for c in cells if "data-key" in c})
                for attrs, cells in self.tables[table_id] if attrs["_in"] == section]


@pytest.fixture(scope="module")
def demo(demo_run):
    _, out = demo_run
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    return out, summary


@pytest.fixture(scope="module")
def report(demo, tmp_path_factory):
    out, summary = demo
    path = write_field_report(out, summary, path=tmp_path_factory.mktemp("report") / "report.html")
    text = path.read_text(encoding="utf-8")
    return path, text, Page(text)


def _strict_parse(text: str) -> None:
    html5lib = pytest.importorskip("html5lib")
    html5lib.HTMLParser(strict=True).parse(text)


def test_default_path_is_report_html_in_the_run_dir(demo, tmp_path):
    out, summary = demo
    run = tmp_path / "run"
    shutil.copytree(out / "maps", run / "maps")
    path = write_field_report(run, summary)
    assert path == run / "report.html" and path.is_file()


def test_report_is_valid_html(report):
    _, text, _ = report
    assert text.startswith("<!DOCTYPE html>")
    _strict_parse(text)


def test_every_image_is_an_embedded_png_and_every_map_appears(demo, report):
    out, _ = demo
    _, _, page = report
    sources = [a["src"] for tag, a in page.tags if tag == "img"]
    assert sources
    embedded = set()
    for src in sources:
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data.startswith(PNG_MAGIC)
        embedded.add(hashlib.sha256(data).hexdigest())
    maps = sorted((out / "maps").glob("*.png"))
    assert maps
    missing = [p.name for p in maps if hashlib.sha256(p.read_bytes()).hexdigest() not in embedded]
    assert missing == []


def test_nothing_is_fetched_from_outside(demo, report):
    out, _ = demo
    _, text, page = report
    assert not [t for t, _ in page.tags if t in ("script", "link", "iframe", "object", "embed")]
    assert "@import" not in text and "url(" not in text
    for value in page.attr_values("src"):
        assert value.startswith("data:")
    for href in page.attr_values("href"):
        assert not re.match(r"^[a-zA-Z][a-zA-Z0-9+.-]*:", href), href  # no scheme at all
        assert not href.startswith(("/", "\\")), href
        if href.startswith("#"):
            assert href[1:] in page.ids, href
        else:  # a relative link to one of the run's own files
            assert (out / unquote(href)).exists(), href
    assert "http://" not in text and "https://" not in text


def test_zone_table_matches_summary_exactly(report, demo):
    _, summary = demo
    _, _, page = report
    rows = page.rows("rate-zones")
    polygons = summary["rate_polygons"]
    assert len(rows) == len(polygons) > 0
    for (attrs, cells), record in zip(rows, polygons, strict=True):
        assert json.loads(attrs["data-zone-id"]) == record["zone_id"]
        assert set(cells) == set(record)
        for key, value in record.items():
            assert json.loads(cells[key]) == value, key
    (_, foot), = page.rows("rate-zones", "tfoot")
    for key, value in foot.items():
        assert key.startswith("totals.")
        assert json.loads(value) == summary["totals"][key[len("totals."):]]


def test_class_table_and_totals_match_summary(report, demo):
    _, summary = demo
    _, _, page = report
    rows = page.rows("rate-classes")
    assert len(rows) == len(summary["zones"]) > 0
    for (_, cells), record in zip(rows, summary["zones"], strict=True):
        assert {k: json.loads(v) for k, v in cells.items()} == record
    totals = {}
    for _, cells in page.rows("field-totals"):
        totals.update({k: json.loads(v) for k, v in cells.items()})
    assert totals == summary["totals"]


def test_cautions_are_near_the_top(report, demo):
    _, summary = demo
    _, text, page = report
    assert summary["cautions"] in page.text
    assert "licensed or certified agronomist" in page.text
    assert page.ids.index("cautions") < page.ids.index("rates")


def test_sections_in_order(report):
    _, _, page = report
    wanted = ["top", "cautions", "rates", "maps", "diagnostics", "parameters", "warnings", "files"]
    assert [i for i in page.ids if i in wanted] == wanted
    assert "@media print" in report[1] and "max-width: 100%" in report[1]


def test_header_and_basis(report, demo):
    _, summary = demo
    _, _, page = report
    field = summary["field"]
    for value in (field["name"], field["farm"], field["sampling_date"], summary["pmap_version"]):
        assert value in page.text
    assert "Rates rest on the measured soil test" in page.text


def test_warnings_and_notes_listed(report, demo):
    _, summary = demo
    _, _, page = report
    assert summary["warnings"] and summary["inputs"]["notes"]
    for line in summary["warnings"] + summary["inputs"]["notes"]:
        assert re.sub(r"\s+", " ", line) in page.text


def test_outputs_listed_with_relative_links(report, demo):
    _, summary = demo
    _, _, page = report
    hrefs = set(page.attr_values("href"))
    assert summary["outputs"]
    for rel, description in summary["outputs"].items():
        assert description in page.text
        assert quote(rel) in hrefs, rel
    assert "summary.json" in hrefs and "maps/ph.png" in hrefs


def test_parameters_and_diagnostics(report, demo):
    _, summary = demo
    _, _, page = report
    assert "calibration-record" in page.ids and "soil-parameters" in page.ids
    assert "kriging-summary" in page.ids
    for name in summary["properties"]:
        assert f"diag-{name.replace('_', '-')}" in page.ids
    assert summary["soil_model"]["calibration"]["source"] in page.text


def test_user_text_is_escaped(demo, tmp_path):
    out, summary = demo
    hostile = copy.deepcopy(summary)
    hostile["field"]["name"] = HOSTILE
    hostile["field"]["farm"] = "Farm & <b>bold</b>"
    hostile["warnings"] = hostile["warnings"] + ["<img src=x onerror=alert(1)> & more"]
    run = tmp_path / "run"
    shutil.copytree(out / "maps", run / "maps")
    text = write_field_report(run, hostile).read_text(encoding="utf-8")
    assert "<script" not in text and "<b>bold" not in text and "<img src=x" not in text
    assert ("&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; Sons&#x27; &quot;Field&quot;"
            in text)
    page = Page(text)
    assert HOSTILE in page.text and "Farm & <b>bold</b>" in page.text
    assert "<img src=x onerror=alert(1)> & more" in page.text
    _strict_parse(text)


def test_optional_overview_and_diagnostics_pictures(demo, tmp_path):
    out, summary = demo
    run = tmp_path / "run"
    shutil.copytree(out / "maps", run / "maps")
    shutil.copy(out / "maps" / "zones.png", run / "overview.png")
    (run / "diagnostics").mkdir()
    # distinct bytes so each picture can be found in the page
    base = (out / "maps" / "stp.png").read_bytes()
    (run / "diagnostics" / "crossval_stp.png").write_bytes(base + b"stp")
    (run / "diagnostics" / "crossval_buffer_ph.png").write_bytes(base + b"buffer_ph")
    (run / "diagnostics" / "sample_layout.png").write_bytes(base + b"layout")
    (run / "diagnostics" / "notes.png").write_bytes(b"not a png")
    text = write_field_report(run, summary).read_text(encoding="utf-8")
    page = Page(text)
    assert page.ids.index("cautions") < page.ids.index("overview") < page.ids.index("rates")
    pictures = {hashlib.sha256(base64.b64decode(a["src"].split(",", 1)[1])).hexdigest()
                for t, a in page.tags if t == "img"}
    for suffix in (b"stp", b"buffer_ph", b"layout"):
        assert hashlib.sha256(base + suffix).hexdigest() in pictures
    # per-property pictures sit in their property's block, the rest under further diagnostics
    assert text.index('id="diag-stp"') < text.index("diagnostics/crossval_stp.png") < text.index(
        'id="diag-caco3"')
    assert text.index('id="diag-buffer-ph"') < text.index("diagnostics/crossval_buffer_ph.png")
    assert text.index('id="diag-other"') < text.index("diagnostics/sample_layout.png")
    assert "diagnostics/notes.png: not a PNG file" in page.text
    _strict_parse(text)


def test_an_empty_run_still_gives_a_report(tmp_path):
    text = write_field_report(tmp_path, {}).read_text(encoding="utf-8")
    page = Page(text)
    assert "cautions" in page.ids and "No maps were found" in page.text
    _strict_parse(text)


def test_batch_index(demo, tmp_path):
    _, summary = demo
    fields = [
        {"name": "Long Meadow", "report": "long-meadow/report.html", "status": "ok",
         "error": None, "summary": summary},
        {"name": "Top & <Bottom>", "report": None, "status": "failed",
         "error": "samples.csv: no pH column <found> & no total P", "summary": None},
        {"name": "Spare field", "report": "spare field/report.html", "status": "skipped",
         "error": None, "summary": None},
    ]
    path = write_batch_index(tmp_path / "batch", fields)
    assert path == tmp_path / "batch" / "index.html"
    text = path.read_text(encoding="utf-8")
    _strict_parse(text)
    page = Page(text)
    hrefs = page.attr_values("href")
    assert "long-meadow/report.html" in hrefs and "spare%20field/report.html" in hrefs
    assert "samples.csv: no pH column <found> & no total P" in page.text
    assert "Top & <Bottom>" in page.text and "<Bottom>" not in text
    rows = page.rows("batch-fields")
    assert [a["data-status"] for a, _ in rows] == ["ok", "failed", "skipped"]
    figures = rows[0][1]
    assert json.loads(figures["p2o5_total_kg"]) == summary["totals"]["p2o5_total_kg"]
    assert json.loads(figures["product_total_kg"]) == summary["totals"]["product_total_kg"]
    assert json.loads(figures["area_ha"]) == summary["totals"]["area_ha"]
    assert json.loads(figures["n_samples_used"]) == summary["inputs"]["n_samples_used"]
    assert (json.loads(figures["mean_available_p_mg_kg"])
            == summary["soil_model"]["mean_available_p_mg_kg"])
    assert rows[1][1] == {}
    assert not [v for v in page.attr_values("src") + hrefs if re.match(r"^[a-z]+:", v)]
