"""Hostile text through the HTTP API: what users type must never become markup or script.

Every place a user's words reach a response is filled with markup-breaking text (subject ids,
sequence labels, treatment labels, metric names, study fields, CSV header names, query parameter
names and values, path segments). The HTML report is tokenized with html.parser, as a browser's
tokenizer would see it, and compared with the report of the same request carrying plain labels:
user text must not add a single element or attribute. Error bodies must be problem+json.
"""

from __future__ import annotations

from collections.abc import Iterator
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from urllib.parse import quote

import httpx
import numpy as np
import pytest

from service.api.app import create_app
from service.api.settings import ServiceSettings
from tests.api.conftest import ApiClient

SCRIPT = '<script>alert("x")</script>'
IMG = '"><img src=x onerror=alert(1)>'
STYLE = "</style><style>body{display:none}</style>"
CDATA = "]]><!-- x --><svg onload=alert(2)>"
BIDI = "\u202eRLO\u2066isolate\u2069\u200f"
SINGLE = "' onmouseover='alert(3)' x='"
HOSTILE = (SCRIPT, IMG, STYLE, CDATA, BIDI, SINGLE)

EVIL = {
    "title": "</title>" + SCRIPT, "analyte": STYLE, "unit": CDATA, "description": IMG + BIDI,
    "test": SCRIPT, "reference": IMG, "baseline": STYLE, "metric": CDATA + "AUC",
    "subjects": [h + str(i) for i, h in enumerate(HOSTILE)],
    "sequences": [SINGLE + "1", BIDI + "2", "</td></tr></table>3"],
}


def same_order(labels: list[str], prefix: str) -> list[str]:
    """Plain labels that sort like `labels`: subjects are analysed in sorted order, so the
    resampling and hence every number of the plain report match the hostile one."""
    rank = {label: i for i, label in enumerate(sorted(labels))}
    return [f"{prefix}{rank[label]}" for label in labels]


PLAIN = {
    "title": "Plain title", "analyte": "analyte", "unit": "unit", "description": "text",
    "test": "T", "reference": "R", "baseline": "B", "metric": "AUC",
    "subjects": same_order(EVIL["subjects"], "S"), "sequences": same_order(EVIL["sequences"], "Q"),
}
PROBLEM_TYPE = "application/problem+json"


def crossover_request(words: dict[str, Any]) -> dict[str, Any]:
    """A constructed 6-subject, three-period crossover (seeded values) labelled with `words`."""
    rng = np.random.default_rng(11)
    arms = (words["test"], words["reference"], words["baseline"])
    records = []
    for i, subject in enumerate(words["subjects"]):
        order = arms[i % 3:] + arms[: i % 3]
        level = float(rng.normal(0.0, 5.0))
        for period, treatment in enumerate(order, start=1):
            base = {arms[0]: 82.0, arms[1]: 80.0, arms[2]: 50.0}[treatment]
            records.append({"subject": subject, "period": period,
                            "sequence": words["sequences"][i % 3], "treatment": treatment,
                            "metric": words["metric"],
                            "value": round(base + level + float(rng.normal(0.0, 2.0)), 3)})
    return {
        "study": {key: words[key] for key in ("title", "analyte", "unit", "description")},
        "design": {"test": arms[0], "reference": arms[1], "baseline": arms[2]},
        "records": records,
        "settings": {"replicates": 200, "seed": 5150},
    }


class Tokens(HTMLParser):
    """Start tags with their attributes, and decoded text, as a browser's tokenizer sees them."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.attributes: list[tuple[str, str, str | None]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.attributes += [(tag, name, value) for name, value in attrs]

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.handle_starttag(tag, attrs)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def tokens(html: str) -> Tokens:
    parser = Tokens()
    parser.feed(html)
    parser.close()
    return parser


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ApiClient]:
    folder: Path = tmp_path_factory.mktemp("hostile")
    api = ApiClient(create_app(ServiceSettings(database_url=f"sqlite:///{folder / 'a.sqlite3'}")))
    yield api
    api.close()


def report_of(client: ApiClient, request: dict[str, Any]) -> httpx.Response:
    created = client.post("/v1/analyses", json=request)
    assert created.status_code == 201, created.text
    report = client.get(f"/v1/analyses/{created.json()['id']}/report")
    assert report.status_code == 200
    return report


def assert_problem(response: httpx.Response, status: int, located: bool = True) -> dict[str, Any]:
    """A problem+json body (RFC 9457 §3) with nosniff, so no browser renders it as HTML."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].split(";")[0].strip() == PROBLEM_TYPE
    assert response.headers["x-content-type-options"] == "nosniff"
    body: dict[str, Any] = response.json()
    assert body["status"] == status
    assert body["errors"] or not located
    assert all(error["loc"] and error["msg"] for error in body["errors"])
    return body


def test_report_has_no_element_or_attribute_from_user_text(client: ApiClient) -> None:
    """With hostile labels everywhere, the report tokenizes (WHATWG HTML tokenizer model, via
    html.parser) into exactly the elements and attribute names of the same report with plain
    labels: user text adds no tag, no on* handler, no link target (OWASP XSS prevention rule 1:
    HTML-encode untrusted data in element content and attributes)."""
    plain = tokens(report_of(client, crossover_request(PLAIN)).text)
    evil = tokens(report_of(client, crossover_request(EVIL)).text)
    assert evil.tags == plain.tags
    assert [(tag, name) for tag, name, _ in evil.attributes] == [
        (tag, name) for tag, name, _ in plain.attributes
    ]
    assert not [name for _, name, _ in evil.attributes if name.startswith("on")]
    assert "script" not in evil.tags and "img" not in evil.tags
    hrefs = [value for _, name, value in evil.attributes if name in ("href", "src", "xlink:href")]
    assert all(value is not None and value.startswith("#") for value in hrefs), hrefs
    # The hostile words are shown as text, not dropped (an auditor must see what was submitted).
    shown = "".join(evil.text)
    for word in (EVIL["title"], EVIL["test"], EVIL["reference"], EVIL["subjects"][1]):
        assert word in shown


def test_report_shows_bidi_controls_without_reordering(client: ApiClient) -> None:
    """Bidirectional override and isolate controls in user text would reorder what an auditor
    reads (Unicode UAX #9; CVE-2021-42574 "Trojan Source"): the report must not pass them through
    as raw characters."""
    html = report_of(client, crossover_request(EVIL)).text
    for control in ("\u202e", "\u2066", "\u2069", "\u200f"):
        assert control not in html, f"raw U+{ord(control):04X} in the report"


def test_report_headers_forbid_scripts_and_remote_loads(client: ApiClient) -> None:
    """The report is served with a Content-Security-Policy (W3C CSP Level 3) whose default-src is
    'none', that grants no script source and no remote origin, and with
    X-Content-Type-Options: nosniff (WHATWG Fetch §3.5)."""
    response = report_of(client, crossover_request(PLAIN))
    assert response.headers["content-type"].startswith("text/html")
    assert response.headers["x-content-type-options"] == "nosniff"
    policy = response.headers["content-security-policy"]
    directives = {
        part.split()[0]: part.split()[1:] for part in policy.split(";") if part.strip()
    }
    assert directives["default-src"] == ["'none'"]
    assert directives.get("script-src", ["'none'"]) == ["'none'"]
    assert "script-src-elem" not in directives and "script-src-attr" not in directives
    for name, sources in directives.items():
        for source in sources:
            assert "://" not in source and source not in ("*", "http:", "https:"), (name, source)
            assert source not in ("'unsafe-eval'", "'strict-dynamic'"), (name, source)
    assert directives.get("img-src", ["data:"]) == ["data:"]


def test_json_problems_never_reflect_text_as_html(client: ApiClient) -> None:
    """A request whose bad fields carry markup is refused as problem+json (RFC 9457), and the JSON
    decodes to the text that was sent, so nothing is interpreted on the way (RFC 8259)."""
    request = crossover_request(EVIL)
    request["records"][0]["treatment"] = SCRIPT + "unknown"
    request["records"][1]["value"] = IMG
    request[STYLE] = 1
    body = assert_problem(client.post("/v1/analyses", json=request), 422)
    locs = [tuple(error["loc"]) for error in body["errors"]]
    assert ("records", 0, "treatment") in locs and ("records", 1, "value") in locs
    assert (STYLE,) in locs


def test_csv_header_and_query_text_in_problems(client: ApiClient) -> None:
    """Hostile CSV header names and query parameter names/values are refused as problem+json
    (RFC 9457) with the offending text kept as JSON string data, and the response is never
    labelled HTML."""
    header = f"subject,period,treatment,value,{SCRIPT}\n"
    body = (header + "S1,1,T,1.0,x\n").encode()
    response = client.post(f"/v1/analyses?{quote(IMG)}={quote(SCRIPT)}&seed={quote(CDATA)}",
                           content=body, headers={"content-type": "text/csv"})
    problem = assert_problem(response, 422)
    messages = " ".join(error["msg"] for error in problem["errors"])
    assert SCRIPT in messages or repr(SCRIPT) in messages
    locs = [tuple(error["loc"]) for error in problem["errors"]]
    assert ("query", IMG) in locs and ("query", "seed") in locs


def test_csv_upload_with_hostile_labels_and_title(client: ApiClient) -> None:
    """Hostile labels in CSV cells and a hostile title in the query reach the report only as text
    (OWASP XSS prevention rule 1), exactly like the JSON upload."""
    request = crossover_request(EVIL)
    lines = ["subject;period;sequence;treatment;metric;value"]
    for r in request["records"]:
        cells = [r["subject"], str(r["period"]), r["sequence"], r["treatment"], r["metric"],
                 str(r["value"]).replace(".", ",")]
        lines.append(";".join('"' + c.replace('"', '""') + '"' for c in cells))
    query = {"title": EVIL["title"], "test": EVIL["test"], "reference": EVIL["reference"],
             "baseline": EVIL["baseline"], "replicates": "200", "seed": "5150"}
    created = client.post("/v1/analyses", params=query, content="\n".join(lines).encode(),
                          headers={"content-type": "text/csv"})
    assert created.status_code == 201, created.text
    report = client.get(f"/v1/analyses/{created.json()['id']}/report")
    parsed = tokens(report.text)
    assert "script" not in parsed.tags and "img" not in parsed.tags
    assert not [name for _, name, _ in parsed.attributes if name.startswith("on")]
    assert EVIL["title"] in "".join(parsed.text)


@pytest.mark.parametrize("segment", [SCRIPT, IMG, CDATA, BIDI])
@pytest.mark.parametrize("suffix", ["", "/report", "/bundle"])
def test_hostile_path_segment_is_a_json_404(client: ApiClient, segment: str, suffix: str) -> None:
    """An unknown id full of markup is a problem+json 404 (RFC 9457), not an HTML page; a segment
    with a slash in it matches no route, and that 404 names no field."""
    response = client.get(f"/v1/analyses/{quote(segment, safe='')}{suffix}")
    body = assert_problem(response, 404, located="/" not in segment)
    assert "<" not in response.headers["content-type"]
    assert body["type"].startswith("urn:")
