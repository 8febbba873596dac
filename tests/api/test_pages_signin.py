"""Browser sign-in: the form, the session cookie, sign-out, revocation, expiry and the 429 window."""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator
from http.cookies import SimpleCookie

import pytest
from sqlalchemy import select

from service.archive.keys import create_key, revoke_key
from service.archive.store import browser_sessions
from tests.api.pages_client import Browser, Clock, browsers, elements, form_token

MakeBrowser = Callable[..., Browser]


@pytest.fixture
def make_browser(database_url: str) -> Iterator[MakeBrowser]:
    yield from browsers(database_url)


def cookie_attributes(header: str) -> tuple[str, str, dict[str, str]]:
    """(name, value, attributes) of one Set-Cookie header (RFC 6265 §4.1 syntax)."""
    parsed = SimpleCookie()
    parsed.load(header)
    (name, morsel), = parsed.items()
    flags = {key: str(morsel[key]) for key in morsel.keys() if morsel[key]}
    return name, morsel.value, flags


def session_set_cookie(response_headers: list[str], name: str) -> dict[str, str] | None:
    for header in response_headers:
        cookie_name, _value, flags = cookie_attributes(header)
        if cookie_name == name:
            return flags
    return None


def stored_sessions(browser: Browser) -> list[str]:
    with browser.app.state.archive.engine.connect() as conn:
        return list(conn.execute(select(browser_sessions.c.session_sha256)).scalars())


def test_login_form_has_key_field_label_and_token(make_browser: MakeBrowser) -> None:
    """GET /login is an HTML form with a labelled `key` field and a hidden csrf_token, posted to
    /login (HTML Living Standard §4.10: a label's `for` names its control; double-submit token:
    OWASP CSRF Prevention Cheat Sheet, common practice)."""
    browser = make_browser()
    create_key(browser.app.state.archive, label="lab-1", role="submit")
    page = browser.get("/login")
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    tags = elements(page.text).tags
    forms = [attrs for tag, attrs in tags if tag == "form" and attrs.get("action") == "/login"]
    assert forms and forms[0]["method"] == "post"
    inputs = {attrs.get("name"): attrs for tag, attrs in tags if tag == "input"}
    assert inputs["key"]["type"] == "password"
    assert inputs["csrf_token"]["type"] == "hidden" and inputs["csrf_token"]["value"]
    labels = [attrs.get("for") for tag, attrs in tags if tag == "label"]
    assert inputs["key"]["id"] in labels
    form_cookie = session_set_cookie(page.headers.get_list("set-cookie"), "bioparity_form")
    assert form_cookie is not None
    assert form_cookie["httponly"] and form_cookie["samesite"].lower() == "strict"


def test_sign_in_gives_a_server_side_session_cookie(make_browser: MakeBrowser) -> None:
    """A valid key: 303 to / (RFC 9110 §15.4.4) and a session cookie that is HttpOnly,
    SameSite=Lax, Path=/, not Secure over plain HTTP (RFC 6265bis §4.1.2), with a random id that
    the archive keeps only as its SHA-256 (FIPS 180-4, via hashlib)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-1", role="submit")
    signed = browser.sign_in(key)
    assert signed.status_code == 303 and signed.headers["location"] == "/"
    headers = signed.headers.get_list("set-cookie")
    flags = session_set_cookie(headers, "bioparity_session")
    assert flags is not None
    assert flags["httponly"] and flags["path"] == "/" and flags["samesite"].lower() == "lax"
    assert "secure" not in flags
    assert int(flags["max-age"]) == 12 * 3600
    session_id = browser.cookies["bioparity_session"]
    assert len(session_id) >= 43  # 32 random bytes, base64url
    assert stored_sessions(browser) == [hashlib.sha256(session_id.encode()).hexdigest()]
    home = browser.get("/")
    assert home.status_code == 200 and "lab-1" in home.text


def test_behind_https_cookies_are_secure_host_cookies(make_browser: MakeBrowser) -> None:
    """With behind_https the session cookie carries Secure and the __Host- prefix, which browsers
    accept only with Secure, Path=/ and no Domain (RFC 6265bis §4.1.3.2)."""
    browser = make_browser(behind_https=True)
    key = create_key(browser.app.state.archive, label="lab-1", role="read")
    page = browser.get("/login")
    form = session_set_cookie(page.headers.get_list("set-cookie"), "__Host-bioparity_form")
    assert form is not None and form["secure"]
    # httpx keeps Secure cookies away from http:// (RFC 6265 §5.4), so post the token by hand.
    # The form cookie holds the very token the form carries (double-submit).
    token = form_token(page.text)
    signed = browser.post("/login", data={"key": key, "csrf_token": token},
                          headers={"cookie": f"__Host-bioparity_form={token}"})
    assert signed.status_code == 303
    flags = session_set_cookie(signed.headers.get_list("set-cookie"), "__Host-bioparity_session")
    assert flags is not None and flags["secure"] and flags["path"] == "/" and "domain" not in flags


def test_wrong_key_is_401_with_the_form_and_no_session(make_browser: MakeBrowser) -> None:
    """An unknown key answers 401 (RFC 9110 §15.5.2) with the sign-in form again, sets no session
    cookie and stores no session; the key typed is not echoed back (OWASP Authentication Cheat
    Sheet, common practice)."""
    browser = make_browser()
    create_key(browser.app.state.archive, label="lab-1", role="submit")
    typed = "bp_" + "x" * 43
    refused = browser.post("/login", data={"key": typed, "csrf_token": browser.token("/login")})
    assert refused.status_code == 401
    assert 'name="key"' in refused.text and typed not in refused.text
    assert session_set_cookie(refused.headers.get_list("set-cookie"), "bioparity_session") is None
    assert stored_sessions(browser) == []


def test_sign_in_without_a_valid_token_is_403(make_browser: MakeBrowser) -> None:
    """A sign-in post without the form's token, or from another origin, is refused with 403 and
    creates no session (login CSRF; OWASP CSRF Prevention Cheat Sheet, common practice; Origin:
    RFC 6454 §7)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-1", role="submit")
    assert browser.post("/login", data={"key": key}).status_code == 403
    assert browser.post("/login", data={"key": key, "csrf_token": "z" * 43}).status_code == 403
    token = browser.token("/login")
    foreign = browser.post("/login", data={"key": key, "csrf_token": token},
                           headers={"origin": "http://elsewhere.example"})
    assert foreign.status_code == 403
    assert stored_sessions(browser) == []
    same = browser.post("/login", data={"key": key, "csrf_token": token},
                        headers={"origin": "http://testserver"})
    assert same.status_code == 303


def test_logout_ends_the_session_on_the_server(make_browser: MakeBrowser) -> None:
    """POST /logout deletes the session row, so the old cookie no longer works anywhere, even if
    a client keeps sending it (OWASP Session Management Cheat Sheet, common practice)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-1", role="submit")
    browser.sign_in(key)
    old = browser.cookies["bioparity_session"]
    out = browser.post("/logout", data={"csrf_token": browser.token("/")})
    assert out.status_code == 303 and out.headers["location"] == "/login"
    assert stored_sessions(browser) == []
    replay = {"cookie": f"bioparity_session={old}"}
    again = make_browser(app=browser.app)
    assert again.get("/", headers=replay).status_code == 303
    assert again.get("/v1/analyses", headers=replay).status_code == 401


def test_revoking_a_key_ends_its_sessions_at_the_next_request(make_browser: MakeBrowser) -> None:
    """After `keys revoke`, the next page view and the next GET /v1 call with the session cookie
    are refused, and the session row is gone (the issue's rule: revocation applies at once).
    Another key stays active: with none left, a loopback service would run open (README)."""
    browser = make_browser()
    archive = browser.app.state.archive
    key = create_key(archive, label="lab-1", role="read")
    create_key(archive, label="lab-2", role="read")
    browser.sign_in(key)
    assert browser.get("/v1/analyses").status_code == 200
    revoke_key(archive, "lab-1")
    assert browser.get("/v1/analyses").status_code == 401
    assert browser.get("/").status_code == 303
    assert stored_sessions(browser) == []


def test_idle_and_absolute_expiry(make_browser: MakeBrowser) -> None:
    """A session ends after 2 h without a request and 12 h after sign-in however busy (defaults;
    OWASP Session Management Cheat Sheet: idle and absolute timeouts, common practice)."""
    clock = Clock()
    browser = make_browser(clock=clock)
    key = create_key(browser.app.state.archive, label="lab-1", role="read")
    browser.sign_in(key)
    clock.advance(hours=1, minutes=59)
    assert browser.get("/").status_code == 200  # used: the idle time starts again
    clock.advance(hours=1, minutes=59)
    assert browser.get("/").status_code == 200
    clock.advance(hours=2, seconds=1)
    assert browser.get("/").status_code == 303  # idle for more than 2 h

    browser.sign_in(key)
    for _hour in range(11):
        clock.advance(hours=1)
        assert browser.get("/v1/analyses").status_code == 200
    clock.advance(minutes=59, seconds=59)
    assert browser.get("/v1/analyses").status_code == 200
    clock.advance(seconds=1)
    assert browser.get("/v1/analyses").status_code == 401  # 12 h after sign-in


def test_failed_sign_ins_are_limited_per_address_and_window(make_browser: MakeBrowser) -> None:
    """After 10 failed sign-ins from one address within 10 minutes every attempt, even with a
    valid key, gets 429 with Retry-After (RFC 6585 §4, RFC 9110 §10.2.3) until the oldest failure
    is 10 minutes old; another address is not affected."""
    clock = Clock()
    browser = make_browser(clock=clock)
    key = create_key(browser.app.state.archive, label="lab-1", role="submit")
    token = browser.token("/login")
    for attempt in range(10):
        wrong = browser.post("/login", data={"key": f"bp_wrong{attempt}", "csrf_token": token})
        assert wrong.status_code == 401
        clock.advance(seconds=30)
    limited = browser.post("/login", data={"key": key, "csrf_token": token})
    assert limited.status_code == 429
    # The first failure was 300 s ago: it leaves the 600 s window in 300 s.
    assert int(limited.headers["retry-after"]) == 300
    assert "bioparity_session" not in browser.cookies

    other = make_browser(address="192.0.2.99", app=browser.app)
    assert other.sign_in(key).status_code == 303

    clock.advance(seconds=299)
    assert browser.post("/login", data={"key": key, "csrf_token": token}).status_code == 429
    clock.advance(seconds=1)
    assert browser.post("/login", data={"key": key, "csrf_token": token}).status_code == 303


def test_open_mode_pages_need_no_sign_in(make_browser: MakeBrowser) -> None:
    """With no key in the archive on loopback the service runs open (README, Access): the pages
    answer without sign-in, and the sign-in page says so."""
    browser = make_browser()
    assert browser.get("/").status_code == 200
    assert browser.get("/upload").status_code == 200
    assert "runs open" in browser.get("/login").text
