from __future__ import annotations

import copy
import itertools
import json
import math
import os
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from typing import Any

import numpy as np
import pytest

from service.report import plots
from service.report.rendering import render_report
from tests.report.fixtures import HOSTILE_SUBJECT, HOSTILE_TITLE, hand_record

SVG_NS = "{http://www.w3.org/2000/svg}"
SVG_BLOCK = re.compile(r"<svg\b.*?</svg>", re.S)


class _Collector(HTMLParser):
    """Start tags, attributes and decoded text, as a browser's tokenizer would see them."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, list[tuple[str, str | None]]]] = []
        self.text: list[str] = []
        self.ids: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, attrs))
        self.ids += [v for k, v in attrs if k == "id" and v is not None]

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(html: str) -> _Collector:
    parser = _Collector()
    parser.feed(html)
    parser.close()
    return parser


def _pipeline_record(hostile: bool = False) -> dict[str, Any]:
    """A small seeded request through the real pipeline (skipped while it is incomplete)."""
    tables = pytest.importorskip("service.intake.tables")
    records = pytest.importorskip("service.records.building")
    rng = np.random.default_rng(7)
    rows = []
    # all six orders of three treatments (a Williams-type plan), two subjects each
    orders = {"".join(t[0] for t in order): order
              for order in itertools.permutations(("NEW", "CURRENT", "PLACEBO"))}
    labels = sorted(orders)
    for i in range(12):
        subject = HOSTILE_SUBJECT if hostile and i == 0 else f"S{i + 1:02d}"
        sequence = labels[i % 6]
        level = rng.normal(50.0, 5.0)
        shift = {"NEW": 20.5, "CURRENT": 20.0, "PLACEBO": 0.0}
        for period, treatment in enumerate(orders[sequence], start=1):
            rows.append({"subject": subject, "period": period, "sequence": sequence,
                         "treatment": treatment, "metric": "AUC",
                         "value": float(level + shift[treatment] + rng.normal(0.0, 2.0))})
    request = {
        "study": {"title": HOSTILE_TITLE if hostile else "Seeded report check",
                  "analyte": "analyte X", "unit": "nmol·h/L"},
        "design": {"test": "NEW", "reference": "CURRENT", "baseline": "PLACEBO"},
        "records": rows,
        "settings": {"replicates": 1000, "seed": 12345},
    }
    inputs = tables.normalize_request(request)
    record: dict[str, Any] = records.build_record(inputs)
    return record


@pytest.fixture(params=["hand", "pipeline"])
def record(request: pytest.FixtureRequest) -> dict[str, Any]:
    if request.param == "pipeline":
        return _pipeline_record()
    return hand_record()


def test_hostile_text_is_escaped_in_html_and_svg() -> None:
    """Escaping per the HTML Living Standard §13.1 as tokenized by Python's html.parser (stdlib):
    user text must come back as text, never as a <script> element."""
    html = render_report(hand_record(hostile=True)).decode("utf-8")
    parsed = _parse(html)
    assert not [t for t, _ in parsed.tags if t == "script"]
    text = "".join(parsed.text)
    assert HOSTILE_SUBJECT in text
    assert HOSTILE_TITLE in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<script" not in html


def test_hostile_text_through_the_pipeline() -> None:
    """Same source (HTML Living Standard tokenizer via html.parser) on a pipeline-built record."""
    try:
        record = _pipeline_record(hostile=True)
    except ValueError as exc:  # the request validator may refuse such a subject id outright
        pytest.skip(f"pipeline refuses the hostile id: {exc}")
    html = render_report(record).decode("utf-8")
    assert "<script" not in html
    assert HOSTILE_SUBJECT in "".join(_parse(html).text)


def test_render_is_byte_identical_and_ignores_key_order(record: dict[str, Any]) -> None:
    """Reproducible output is common practice for audit documents: same record, same bytes, even
    when the JSON object members arrive in another order (RFC 8259 §4: members are unordered)."""
    first = render_report(record)
    second = render_report(copy.deepcopy(record))
    shuffled = json.loads(json.dumps(record, sort_keys=True))
    assert first == second
    assert first == render_report(shuffled)


def test_no_external_resource(record: dict[str, Any]) -> None:
    """Self-contained document: no fetchable reference (HTML Living Standard: src/href attributes;
    CSS Values 4 url(); CSS Cascade @import)."""
    html = render_report(record).decode("utf-8")
    for needle in ("src=", 'href="http', "url(", "@import", "<script", "<link", "<iframe"):
        assert needle not in html, needle
    hrefs = [v for _, attrs in _parse(html).tags for k, v in attrs if k == "href"]
    assert hrefs and all(v is not None and v.startswith("#") for v in hrefs)
    ids = set(_parse(html).ids)
    assert all(v is not None and v[1:] in ids for v in hrefs)


def test_required_sections_and_accessibility(record: dict[str, Any]) -> None:
    """WCAG 2.1 SC 3.1.1 (lang on html), SC 1.1.1 (text alternative: <title> in each SVG), SC 1.3.1
    (table header cells); report sections from the product brief."""
    html = render_report(record).decode("utf-8")
    parsed = _parse(html)
    assert ("lang", "en") in parsed.tags[0][1]
    for ident in ("header", "cautions", "verdicts", "m0", "warnings", "methods", "references"):
        assert ident in parsed.ids, ident
    for phrase in ("not a substitute", "statistical analysis plan", "qualified statistician",
                   "fix in advance", "Efron 1987", "Fieller", "RFC 8785", "Jackknife",
                   "Bootstrap", "Per-subject values", "Per-treatment summary", "@media print"):
        assert phrase in html, phrase
    assert "<th scope=\"col\"" in html
    assert "not archived" in html


def test_svg_is_well_formed_and_titled(record: dict[str, Any]) -> None:
    """Each inline SVG must be well-formed XML (XML 1.0 §2.1, parsed by xml.etree) with a <title> as
    its first child (SVG 2 §5.9, accessible name)."""
    html = render_report(record).decode("utf-8")
    blocks = SVG_BLOCK.findall(html)
    assert len(blocks) >= 2
    for block in blocks:
        root = ET.fromstring(block)
        assert root.tag == SVG_NS + "svg"
        assert root[0].tag == SVG_NS + "title" and (root[0].text or "").strip()


def test_histogram_bars_are_proportional_to_counts() -> None:
    """A frequency histogram draws bar heights proportional to the bin counts and bar widths
    proportional to the bin widths (definition, common practice); checked with numpy."""
    record = hand_record()
    boot = record["result"]["metrics"][0]["ratio_of_mean_differences"]["bootstrap"]
    counts = np.array(boot["histogram"]["counts"], dtype=float)
    widths = np.diff(np.array(boot["histogram"]["edges"], dtype=float))
    svg = plots.histogram_svg("h", boot["histogram"]["edges"], boot["histogram"]["counts"], 0.0,
                              (-0.1, 0.1), "BCa", (-0.2, 0.2), "test")
    bars = [e for e in ET.fromstring(svg).iter(SVG_NS + "rect") if e.get("class") == "bar"]
    heights = np.array([float(b.get("height", "nan")) for b in bars])
    drawn_widths = np.array([float(b.get("width", "nan")) for b in bars])
    assert len(bars) == counts.size
    scale = heights.max() / counts.max()
    np.testing.assert_allclose(heights, counts * scale, atol=0.011)
    np.testing.assert_allclose(drawn_widths, widths * drawn_widths.mean() / widths.mean(),
                               atol=0.011)


def _tick_positions(svg: str, css_class: str, coordinate: str) -> tuple[list[float], list[float]]:
    values, positions = [], []
    for text in ET.fromstring(svg).iter(SVG_NS + "text"):
        if text.get("class") == css_class:
            values.append(float((text.text or "").replace(plots.MINUS, "-")))
            positions.append(float(text.get(coordinate, "nan")))
    return values, positions


def test_linear_axis_ticks_are_affine_in_value() -> None:
    """On a linear axis the pixel position is an affine function of the value (definition of a
    linear scale); the numpy.polyfit residual must vanish up to the 0.01 px rounding."""
    svg = plots.histogram_svg("h", [-0.31, -0.1, 0.05, 0.27], [3, 9, 4], 0.0, None, "BCa",
                              (-0.2, 0.2), "test")
    values, positions = _tick_positions(svg, "tick-x", "x")
    assert len(values) >= 4
    coef = np.polyfit(values, positions, 1)
    assert np.max(np.abs(np.polyval(coef, values) - positions)) < 0.02
    steps = np.diff(values)
    np.testing.assert_allclose(steps, steps[0], rtol=1e-9)


def test_log_axis_ticks_are_affine_in_log10() -> None:
    """On a log axis the pixel position is affine in log10(value) (definition of a logarithmic
    scale), checked with numpy.polyfit on the drawn tick labels."""
    curve = plots.Curve("s", (0.0, 1.0, 2.0, 4.0, 8.0, 12.0), (0.0, 80.0, 55.0, 20.0, 3.0, 0.7),
                        (False, False, False, True, True, True))
    svg = plots.profiles_svg("p", [curve], True, "log test", "ng/mL")
    values, positions = _tick_positions(svg, "tick-y", "y")
    assert len(values) >= 3
    logs = np.log10(values)
    coef = np.polyfit(logs, positions, 1)
    assert coef[0] < 0  # larger concentrations higher up
    assert np.max(np.abs(np.polyval(coef, logs) - positions)) < 0.02
    assert len([c for c in ET.fromstring(svg).iter(SVG_NS + "circle")]) == 3


def test_missing_figures_read_not_computable_never_none_or_nan() -> None:
    """JSON null (RFC 8259) and, defensively, IEEE 754 NaN must reach the reader as words or a dash,
    never as Python's 'None' or 'nan' (product contract, DESIGN.md 'no NaN in output')."""
    record = hand_record()
    rmd = record["result"]["metrics"][0]["ratio_of_mean_differences"]
    rmd["bootstrap"]["intervals"]["bca"] = {"lower": None, "upper": None}
    rmd["jackknife"]["standard_error"] = None
    rmd["bootstrap"]["bias"] = math.nan
    rmd["acceptance"].update(lower=None, upper=None, verdict="undetermined",
                             reason="the BCa acceleration is undefined")
    html = render_report(record).decode("utf-8")
    text = "".join(_parse(html).text)
    assert "not computable" in text
    assert "no 90\u00a0% BCa interval could be computed" in text
    assert not re.search(r"\b(None|nan|NaN|inf|Infinity)\b", text)


@pytest.mark.parametrize(
    ("kind", "expected"),
    [("bounded", "[0.010, 0.200]"),
     ("exclusive", "(\u2212\u221e, 0.010] \u222a [0.200, +\u221e)"),
     ("unbounded", "(\u2212\u221e, +\u221e)")],
)
def test_fieller_set_is_written_in_interval_notation(kind: str, expected: str) -> None:
    """The three shapes of a Fieller set (Fieller 1954, JRSS-B 16:175-185): a bounded interval,
    the complement of an interval (two rays), or the whole real line, in ISO 80000-2 notation."""
    record = hand_record()
    record["result"]["metrics"][0]["ratio_of_mean_differences"]["fieller"] = {
        "kind": kind, "lower": 0.01 if kind != "unbounded" else None,
        "upper": 0.2 if kind != "unbounded" else None}
    assert expected in "".join(_parse(render_report(record).decode("utf-8")).text)


def test_verdict_sentence_states_interval_and_limits(record: dict[str, Any]) -> None:
    """The verdict restates the acceptance rule (interval wholly inside the limits; DESIGN.md,
    common practice for interval inclusion) with the record's numbers, formatted by str.format."""
    acceptance = record["result"]["metrics"][0]["ratio_of_mean_differences"]["acceptance"]
    text = "".join(_parse(render_report(record).decode("utf-8")).text)
    lower = f"{acceptance['lower']:.3f}".replace("-", "\u2212")
    upper = f"{acceptance['upper']:.3f}".replace("-", "\u2212")
    assert f"[{lower}, {upper}]" in text
    inside = acceptance["limits"]["lower"] <= acceptance["lower"] and (
        acceptance["upper"] <= acceptance["limits"]["upper"])
    assert (acceptance["verdict"] == "within_limits") == inside
    word = "within limits." if inside else "not within limits."
    assert f"[\u22120.20, +0.20]: {word}" in text


def test_bad_record_names_the_field() -> None:
    """Bad input gets a clear error naming the field (product contract, DESIGN.md)."""
    record = hand_record()
    del record["result"]
    with pytest.raises(ValueError, match=r"record\.result"):
        render_report(record)
    record = hand_record()
    boot = record["result"]["metrics"][0]["ratio_of_mean_differences"]["bootstrap"]
    boot["histogram"]["counts"].append(1)
    with pytest.raises(ValueError, match=r"metrics\[0\]\.ratio_of_mean_differences\.bootstrap"):
        render_report(record)
    record = hand_record()
    record["result"]["metrics"] = {"AUC": {}}
    with pytest.raises(ValueError, match=r"record\.result\.metrics"):
        render_report(record)


def _profile_request() -> dict[str, Any]:
    """A 2×2 crossover of 8 subjects with one-compartment oral profiles and seeded noise."""
    rng = np.random.default_rng(11)
    times = [0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0]
    points = []
    for i in range(8):
        sequence = "TR" if i % 2 == 0 else "RT"
        for period, treatment in enumerate(("NEW", "OLD") if sequence == "TR" else ("OLD", "NEW"),
                                           start=1):
            ka, ke, scale = 1.2, 0.15 * rng.lognormal(0, 0.1), 100.0 * rng.lognormal(0, 0.15)
            for t in times:
                c = scale * ka / (ka - ke) * (math.exp(-ke * t) - math.exp(-ka * t))
                points.append({"subject": f"P{i + 1}", "period": period, "sequence": sequence,
                               "treatment": treatment, "time": t,
                               "concentration": round(c * rng.lognormal(0, 0.05), 3)})
    return {"study": {"title": "Profile check", "analyte": "compound Q", "unit": "ng/mL"},
            "design": {"test": "NEW", "reference": "OLD"}, "profiles": points,
            "settings": {"replicates": 500, "seed": 99}}


def test_profiles_section_marks_exactly_the_terminal_points() -> None:
    """The λz points drawn are those the record lists in lambda_z_times (one-compartment oral model,
    Bateman function, generated with seeded noise); each treatment gets a linear and a log figure,
    and tmax appears as a per-treatment median table (summary-only metric, DESIGN.md)."""
    tables = pytest.importorskip("service.intake.tables")
    records = pytest.importorskip("service.records.building")
    record = records.build_record(tables.normalize_request(_profile_request()))
    html = render_report(record).decode("utf-8")
    assert 'id="profiles"' in html
    figures = [ET.fromstring(b) for b in SVG_BLOCK.findall(html)]
    profile_figures = [f for f in figures if "Profiles of" in (f[0].text or "")]
    assert len(profile_figures) == 4
    linear = [f for f in profile_figures if "linear" in (f[0].text or "")]
    drawn = sum(1 for f in linear for c in f.iter(SVG_NS + "circle")
                if c.get("class") == "fit-point")
    listed = sum(len(p["lambda_z_times"] or []) for p in record["result"]["profiles"])
    assert listed > 0 and drawn == listed
    tmax = [m for m in record["result"]["metrics"] if m.get("analysis") == "summary_only"]
    if tmax:
        assert "Median" in html


def test_render_is_identical_across_processes_and_hash_seeds(tmp_path: Any) -> None:
    """Byte-identical output must not depend on Python's per-process string-hash randomisation
    (Python docs, PYTHONHASHSEED): render the same record in two fresh interpreters."""
    source = tmp_path / "record.json"
    source.write_text(json.dumps(hand_record(hostile=True)), encoding="utf-8")
    script = ("import json,sys; from service.report.rendering import render_report; "
              "sys.stdout.buffer.write(render_report(json.load(open(sys.argv[1]))))")
    outputs = []
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        done = subprocess.run([sys.executable, "-c", script, str(source)], env=env,
                              capture_output=True, check=True, timeout=60)
        outputs.append(done.stdout)
    assert outputs[0] == outputs[1] == render_report(json.loads(source.read_text("utf-8")))


def test_archived_record_shows_id_and_time() -> None:
    """An archived record carries id and created_at (DESIGN.md §Record); both are shown and the
    'not archived' placeholder disappears."""
    record = hand_record()
    record.update(id="rec-7f3a", created_at="2026-12-02T00:00:00Z")
    html = render_report(record).decode("utf-8")
    assert "rec-7f3a" in html and "2026-12-02T00:00:00Z" in html
    assert "not archived" not in html
