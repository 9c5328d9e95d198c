"""The search page at ``GET /`` in a real headless Chromium, against a real uvicorn server.

Debian's ``chromium`` and ``chromium-driver`` packages (installed by ``scripts/test.sh``)
driven by Selenium. The driver path is given to Selenium's ``Service``, so Selenium Manager
never runs and nothing is downloaded (selenium/webdriver/common/driver_finder.py skips it
when a path is given). The encoder is the seeded ``HashingEmbedder``: this test checks the
page's plumbing and access rules, not ranking quality, so queries share words with their
answers and the lexical mode is used where a particular document must come first.

Screenshots go to ``test-artifacts/`` (gitignored; CI keeps it as an artifact).
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.keys import KeyStore
from sounding.service.routes.page import STATIC_DIR
from sounding.service.settings import ServiceSettings

from tests.serving import running

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
WAIT = 30  # seconds; a generous ceiling for a loaded 2-core CI box, not a timing assertion

ROOTS = {
    "wiki": {
        "runbooks/reservoir-valve.md": (
            "---\ntitle: Reservoir valve replacement\ntags: [runbook]\n"
            "url: https://wiki.example.org/runbooks/reservoir-valve\n---\n"
            "# Reservoir valve replacement\n\n## Isolation\n\nClose the upstream gate before "
            "unbolting the flange of the reservoir valve.\n\n## Testing\n\nOpen the valve "
            "slowly and watch the pressure gauge on the outlet main.\n"
        ),
        "guides/incident-review.md": (
            "---\ntitle: Incident reviews\ntags: [incident, process]\n---\n# Incident reviews\n\n"
            "## Writing\n\n*Writing a post-incident review* starts within **two days**; quote "
            "the alarm code ERR-4472 and the ERR-4471 before it.\n\n- Timeline first\n"
            "- Then causes\n\n| Record type | Kept for |\n|---|---|\n| Review | 6 years |\n"
            "| Alarm log | 2 years |\n"
        ),
        "guides/transport.md": (
            "# Transport of spares\n\n## Modes\n\n3. Rail and road\n\nRail is the default for "
            "bulk transfers between the depots. "
            + "Road is used when the rail link is closed for maintenance works. " * 12
            + "\n"
        ),
        "hr/salary-bands.md": (
            "---\ntitle: Salary bands for field staff\ngroups: [hr]\n---\n"
            "# Salary bands for field staff\n\n## Bands\n\nField technicians are paid on "
            "salary band four; the zebracorn allowance is added monthly.\n"
        ),
    },
    "handbook": {
        "pump-station.md": (
            "---\ntitle: Pump station restart\nurl: \"javascript:alert('pump')\"\n---\n"
            "# Pump station restart\n\n## After a power cut\n\nReset the breaker, then start "
            "the duty pump before the standby pump.\n"
        ),
        "kiosk.txt": (
            "Kiosk printer notes\n\nThe kiosk printer jams when the tray is overfilled. "
            "Markup stays text: <b>bold</b> <img src=x onerror=\"document.title='pwned'\"> "
            "& amp;\n"
        ),
        "zebracorn-mascot.md": (
            "# Zebracorn mascot\n\nThe zebracorn is the cooperative's mascot on the open day "
            "posters.\n"
        ),
    },
}
RESTRICTED = "hr/salary-bands.md"
RESTRICTED_TITLE = "Salary bands for field staff"
MODIFIED = 1773446400  # 2026-03-14 00:00 UTC, the pages' modification time
WIKI_URL = "https://wiki.example.org/{stem}"


def _browser_or_skip() -> None:
    """Skip when no browser is installed locally; fail under CI, which must run this test."""
    missing = [str(p) for p in (CHROMIUM, CHROMEDRIVER) if not p.exists()]
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("the selenium package (pip install selenium)")
    if missing:
        reason = (
            "search page test needs "
            + ", ".join(missing)
            + "; `bash scripts/test.sh` installs them (apt-get chromium chromium-driver)"
        )
        if os.environ.get("CI"):
            pytest.fail(reason + " — CI is set, so this test may not be skipped")
        pytest.skip(reason)


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict]:
    """Two indexed roots, three keys (none for hr, one with hr, one write key), a server."""
    base = tmp_path_factory.mktemp("page")
    roots = []
    for name, pages in ROOTS.items():
        root = base / name
        for rel, text in pages.items():
            path = root / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(text)
            os.utime(path, (MODIFIED, MODIFIED))
        roots.append(root)
    settings = ServiceSettings(
        index_dir=base / "index",
        reload_check_seconds=0,
        max_query_chars=200,
        require_keys=True,
        # Small windows, so the long page is cut in overlapping chunks.
        chunk_tokens=48,
        chunk_overlap=12,
        collection_urls={"wiki": WIKI_URL},
    )
    embedder = HashingEmbedder(32, seed=3)
    refresh_index(roots, settings, embedder)
    with KeyStore(settings.keys_file) as store:
        keys = {
            "staff": store.create("staff", "read")[1],
            "hr": store.create("hr-officer", "read", groups="hr")[1],
        }
    with running(create_app(settings, embedder=embedder)) as url:
        yield {"url": url, "keys": keys}


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[object]:
    _browser_or_skip()
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    # The flags that keep Chromium from reaching for Google's services on a closed network.
    for flag in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        "--window-size=1200,900",
        f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}",
    ):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SE_OFFLINE", "true")  # belt and braces: Selenium Manager must not download
        driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(WAIT)
    try:
        yield driver
    finally:
        driver.quit()


def _screenshot(driver, name: str) -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / f"search-page-{name}.png"
    assert driver.save_screenshot(str(path)), f"Chromium could not write {path}"
    assert path.stat().st_size > 1000
    return path


def _wait(driver, condition, message: str):
    from selenium.webdriver.support.ui import WebDriverWait

    return WebDriverWait(driver, WAIT).until(lambda d: condition(d), message)


def _by_id(driver, element_id: str):
    from selenium.webdriver.common.by import By

    return driver.find_element(By.ID, element_id)


def _css(driver, selector: str) -> list:
    from selenium.webdriver.common.by import By

    return driver.find_elements(By.CSS_SELECTOR, selector)


def _open(driver, site: dict, key: str | None) -> None:
    """A fresh page for one person: their key (or none) in this tab's session storage."""
    driver.get(site["url"] + "/")
    driver.execute_script("sessionStorage.clear()")
    if key is not None:
        driver.execute_script(
            "sessionStorage.setItem('sounding.key', arguments[0])", site["keys"][key]
        )
    driver.get(site["url"] + "/?fresh")
    _wait(
        driver,
        lambda d: d.execute_script("return document.readyState") == "complete",
        "the page did not finish loading",
    )


def _search(driver, query: str, mode: str = "hybrid", collection: str = "") -> list[dict]:
    """Type a query, pick a mode (and collection), press Enter; the results as shown."""
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import Select

    Select(_by_id(driver, "mode")).select_by_value(mode)
    if collection:
        _wait(
            driver,
            lambda d: _by_id(d, "collection").is_displayed(),
            "the collection filter never appeared",
        )
        Select(_by_id(driver, "collection")).select_by_value(collection)
    box = _by_id(driver, "q")
    box.clear()
    box.send_keys(query, Keys.ENTER)
    _wait(
        driver,
        lambda d: _by_id(d, "results").is_displayed() or _by_id(d, "error").is_displayed(),
        f"no results or error for {query!r}",
    )
    _wait(
        driver,
        lambda d: d.execute_script("return document.body.getAttribute('aria-busy')") == "false",
        "the page stayed busy",
    )
    return [
        {
            "title": item.find_element("css selector", ".result-link").text,
            "href": item.find_element("css selector", ".result-link").get_attribute("href"),
            "trail": [t.text for t in item.find_elements("css selector", ".trail")],
            "passage": item.find_element("css selector", ".passage").text,
            "marks": [m.text for m in item.find_elements("css selector", ".passage mark")],
        }
        for item in _css(driver, "#result-list .result")
    ]


def _problems(driver) -> list[str]:
    """Console entries that mean the page broke: script errors and CSP refusals.

    Failed requests (the 401 before a key is given) are logged too; they are expected.
    """
    return [
        e["message"]
        for e in driver.get_log("browser")
        if e["level"] == "SEVERE" and "Failed to load resource" not in e["message"]
    ]


# ---- HTTP: what the page response promises, without a browser ----


def test_page_is_served_without_a_key_under_a_strict_policy(site: dict) -> None:
    r = httpx.get(site["url"] + "/")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    policy = r.headers["content-security-policy"]
    # Content Security Policy Level 3 (W3C): 'self' only, nothing inline, no framing.
    assert "default-src 'self'" in policy and "frame-ancestors 'none'" in policy
    assert "unsafe-inline" not in policy and "unsafe-eval" not in policy
    assert r.headers["x-content-type-options"] == "nosniff"
    for asset in ("page.js", "page.css"):
        s = httpx.get(f"{site['url']}/static/{asset}")
        assert s.status_code == 200 and s.headers["content-security-policy"] == policy
    # The data behind the page still needs a key.
    assert httpx.post(site["url"] + "/search", json={"query": "valve"}).status_code == 401


def test_static_files_load_nothing_from_outside_the_service() -> None:
    """Air-gapped networks: no absolute URL, font or import in the page's own files."""
    files = sorted(p for p in STATIC_DIR.iterdir() if p.is_file())
    assert {p.name for p in files} >= {"index.html", "page.js", "page.css"}
    for path in files:
        # The SVG icon's namespace is a name, never fetched.
        text = path.read_text().replace('xmlns="http://www.w3.org/2000/svg"', "")
        assert "://" not in text, f"{path.name} names an absolute URL"
        assert "@import" not in text and "@font-face" not in text, path.name
        assert "innerHTML" not in text and "insertAdjacentHTML" not in text, path.name
        assert "<style" not in text and " style=" not in text, path.name
    html = (STATIC_DIR / "index.html").read_text()
    assert re.search(r'<meta name="viewport" content="width=device-width', html)
    assert "<script>" not in html  # inline script would be refused by the policy anyway


# ---- in Chromium ----


def test_search_results_and_source_link_in_chromium(site: dict, browser) -> None:
    driver = browser
    _open(driver, site, None)
    # No key yet: the API says 401 and the page asks for one, with the focus on the field.
    _wait(
        driver,
        lambda d: _by_id(d, "key-panel").is_displayed(),
        "the key field did not appear after a 401",
    )
    assert driver.switch_to.active_element.get_attribute("id") == "key"
    from selenium.webdriver.common.keys import Keys

    _by_id(driver, "key").send_keys(site["keys"]["staff"], Keys.ENTER)
    _wait(driver, lambda d: not _by_id(d, "key-panel").is_displayed(), "the key was not taken")
    assert (
        driver.execute_script("return sessionStorage.getItem('sounding.key')")
        == site["keys"]["staff"]
    )
    assert driver.switch_to.active_element.get_attribute("id") == "q"

    results = _search(driver, "unbolting the reservoir valve flange", mode="lexical")
    assert results, "no results shown"
    top = results[0]
    assert top["title"] == "Reservoir valve replacement"
    assert top["trail"] == ["Isolation"]
    assert "flange" in top["passage"]
    # Query words are highlighted; stopwords ("the") are not.
    assert {m.lower() for m in top["marks"]} >= {"unbolting", "reservoir", "valve", "flange"}
    assert "the" not in {m.lower() for m in top["marks"]}
    # Order and a strength beside the top result, never raw fused scores.
    ranks = [r.text for r in _css(driver, "#result-list .rank")]
    assert ranks == [f"{i}." for i in range(1, len(results) + 1)]
    strengths = [float(m.get_attribute("value")) for m in _css(driver, "#result-list meter")]
    assert strengths[0] == 1 and all(0 <= v <= 1 for v in strengths)
    assert "0.0" not in _by_id(driver, "results").text
    # Relative sources, dates, and the link to the original page (collection_urls).
    assert _css(driver, "#result-list .source")[0].text == "runbooks/reservoir-valve.md"
    assert not any(s.text.startswith("/") for s in _css(driver, "#result-list .source"))
    assert _css(driver, "#result-list .date")[0].text == "2026-03-14"
    link = _css(driver, "#result-list .result")[0].find_element("css selector", "a.original")
    assert link.get_attribute("href") == "https://wiki.example.org/runbooks/reservoir-valve"
    _screenshot(driver, "results")

    # Open the source: the document view, scrolled to and focused on the passage found.
    _css(driver, "#result-list .result-link")[0].click()
    _wait(driver, lambda d: _by_id(d, "document").is_displayed(), "the document did not open")
    assert "doc=runbooks%2Freservoir-valve.md" in driver.current_url
    assert _by_id(driver, "doc-title").text == "Reservoir valve replacement"
    target = _css(driver, "#doc-chunks #found")
    # The passage's text is marked (in pieces around highlights); the first piece has focus.
    marked = "".join(e.text for e in _css(driver, "#doc-chunks .found"))
    assert len(target) == 1 and "flange" in marked and "pressure gauge" not in marked
    assert driver.switch_to.active_element == target[0]
    assert driver.execute_script(
        "const r = arguments[0].getBoundingClientRect();"
        "return r.top >= 0 && r.bottom <= window.innerHeight;",
        target[0],
    )
    original = _by_id(driver, "original")
    assert original.get_attribute("href") == "https://wiki.example.org/runbooks/reservoir-valve"
    _screenshot(driver, "document")

    # Back returns to the same results.
    _by_id(driver, "back").click()
    _wait(driver, lambda d: _by_id(d, "results").is_displayed(), "Back did not show results")
    _wait(
        driver,
        lambda d: len(_css(d, "#result-list .result")) == len(results),
        "Back showed other results",
    )
    assert _problems(driver) == []


def test_a_document_url_that_is_not_a_web_link_is_not_linked(site: dict, browser) -> None:
    _open(browser, site, "staff")
    browser.get(site["url"] + "/#doc=pump-station.md")
    _wait(browser, lambda d: _by_id(d, "document").is_displayed(), "the document did not open")
    assert _by_id(browser, "doc-title").text == "Pump station restart"
    assert _css(browser, "#original") == []
    assert _css(browser, "#doc-meta a") == []


def test_passage_markup_is_shown_as_text_never_run(site: dict, browser) -> None:
    _open(browser, site, "staff")
    results = _search(browser, "kiosk printer bold amp", mode="lexical")
    # Small windows here: the note may come in more than one passage.
    kiosk = {
        "passage": " ".join(r["passage"] for r in results if r["title"] == "Kiosk printer notes")
    }
    assert "<b>bold</b>" in kiosk["passage"] and "onerror=" in kiosk["passage"]
    assert _css(browser, "#result-list .passage b, #result-list .passage img") == []
    assert browser.title != "pwned"
    # "amp" is a query word: it highlights the word, never breaks the "&" beside it.
    assert "& amp;" in kiosk["passage"]


def test_restricted_document_hidden_without_its_group(site: dict, browser) -> None:
    query = "salary band zebracorn allowance field technicians"
    _open(browser, site, "staff")
    for mode in ("dense", "hybrid", "lexical"):  # lexical last: its page is checked below
        titles = [r["title"] for r in _search(browser, query, mode=mode)]
        assert titles, f"{mode}: an unrestricted document matching the query should show"
        assert RESTRICTED_TITLE not in titles, mode
    assert "Zebracorn mascot" in titles
    assert "Salary" not in _by_id(browser, "results").text
    assert "salary" not in _by_id(browser, "status").text.replace(query, "")
    _screenshot(browser, "restricted-hidden")
    # Nor can its document view be opened by id: the same answer as a document that is not there.
    browser.get(site["url"] + "/#doc=" + RESTRICTED.replace("/", "%2F"))
    _wait(browser, lambda d: _by_id(d, "error").is_displayed(), "no error for a hidden document")
    assert "not in the index, or your key may not read it" in _by_id(browser, "error").text
    assert not _by_id(browser, "document").is_displayed()
    # The collection filter counts only what this key may see.
    counts = [o.text for o in _css(browser, "#collection option")]
    assert "wiki (3)" in counts, counts

    _open(browser, site, "hr")
    results = _search(browser, query, mode="lexical")
    assert results[0]["title"] == RESTRICTED_TITLE
    assert "zebracorn" in {m.lower() for m in results[0]["marks"]}
    assert "wiki (4)" in [o.text for o in _css(browser, "#collection option")]
    _screenshot(browser, "restricted-shown")


def test_collection_filter_limits_results(site: dict, browser) -> None:
    _open(browser, site, "staff")
    results = _search(browser, "zebracorn kiosk valve pump", mode="lexical", collection="handbook")
    titles = {r["title"] for r in results}
    assert titles and titles <= {"Kiosk printer notes", "Zebracorn mascot", "Pump station restart"}
    assert "collection=handbook" in browser.current_url


def test_keyboard_only_search_and_open(site: dict, browser) -> None:
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.keys import Keys

    _open(browser, site, "staff")
    assert browser.switch_to.active_element.get_attribute("id") == "q"  # focus on load
    ActionChains(browser).send_keys("pump station breaker", Keys.ENTER).perform()
    _wait(browser, lambda d: len(_css(d, "#result-list .result-link")) > 0, "no results")
    first = _css(browser, "#result-list .result-link")[0]
    for _ in range(12):  # Tab from the query box through the controls to the first result
        ActionChains(browser).send_keys(Keys.TAB).perform()
        if browser.switch_to.active_element == first:
            break
    else:
        pytest.fail("the first result link is not reachable with Tab")
    outline = browser.execute_script(
        "const s = getComputedStyle(document.activeElement);"
        "return [s.outlineStyle, parseFloat(s.outlineWidth)];"
    )
    assert outline[0] != "none" and outline[1] >= 2, f"focus is not visible: {outline}"
    ActionChains(browser).send_keys(Keys.ENTER).perform()
    _wait(browser, lambda d: _by_id(d, "document").is_displayed(), "Enter did not open it")


def test_errors_are_explained(site: dict, browser) -> None:
    _open(browser, site, "staff")
    # 422: longer than the service's max_query_chars (200 here).
    _search(browser, "valve " * 40)
    error = _by_id(browser, "error").text
    assert error.startswith("The service could not take this query") and "200" in error
    # 401: a wrong key brings the key field back, saying the key was not accepted.
    browser.execute_script(
        "sessionStorage.setItem('sounding.key', 'snd_000000000000_' + 'x'.repeat(43))"
    )
    browser.get(site["url"] + "/#q=valve&mode=lexical")
    _wait(browser, lambda d: _by_id(d, "error").is_displayed(), "no error for a bad key")
    assert "access key was not accepted" in _by_id(browser, "error").text
    assert _by_id(browser, "key-panel").is_displayed()


def test_readable_on_a_phone(site: dict, browser) -> None:
    browser.set_window_size(390, 844)
    try:
        _open(browser, site, "staff")
        _search(browser, "reservoir valve pressure gauge outlet", mode="lexical")
        widths = browser.execute_script(
            "return [document.documentElement.scrollWidth, document.documentElement.clientWidth]"
        )
        assert widths[0] <= widths[1], f"the page scrolls sideways on a phone: {widths}"
        box = _by_id(browser, "q").rect
        assert box["width"] >= 200 and box["height"] >= 40
        _screenshot(browser, "phone")
    finally:
        browser.set_window_size(1200, 900)


def test_no_index_is_explained_and_keys_may_be_off_on_loopback(tmp_path: Path, browser) -> None:
    """503 from a service with no index yet; with require_keys off, no key field at all."""
    settings = ServiceSettings(
        index_dir=tmp_path / "empty", require_keys=False, reload_check_seconds=0
    )
    with running(create_app(settings, embedder=HashingEmbedder(32, seed=3))) as url:
        browser.get(url + "/")
        browser.execute_script("sessionStorage.clear()")
        browser.get(url + "/#q=valve&mode=dense")
        _wait(browser, lambda d: _by_id(d, "error").is_displayed(), "no error without an index")
        error = _by_id(browser, "error").text
        assert error.startswith("Search is not available right now") and "no index" in error
        assert not _by_id(browser, "key-panel").is_displayed()
        assert not _by_id(browser, "key-toggle").is_displayed()


def _document_json(site: dict, doc_id: str) -> dict:
    headers = {"Authorization": "Bearer " + site["keys"]["staff"]}
    r = httpx.get(f"{site['url']}/documents/{doc_id}", headers=headers)
    assert r.status_code == 200
    return r.json()


def test_favicon_is_served_without_a_key(site: dict) -> None:
    r = httpx.get(site["url"] + "/favicon.ico")
    assert r.status_code == 200 and r.headers["content-type"].startswith("image/svg+xml")
    assert r.headers["content-security-policy"]


def test_a_bookmarked_document_opens_in_a_new_tab_after_the_key(site: dict, browser) -> None:
    from selenium.webdriver.common.keys import Keys

    doc = _document_json(site, "guides/transport.md")
    assert len(doc["chunks"]) > 2, "the long page should be cut in overlapping windows"
    chunk = doc["chunks"][2]
    _open(browser, site, None)  # a new tab: no key in its session storage
    browser.get(
        site["url"] + "/#q=rail+road+maintenance&mode=lexical&tag=process"
        f"&doc=guides%2Ftransport.md&chunk={chunk['chunk_id']}"
    )
    _wait(browser, lambda d: _by_id(d, "key-panel").is_displayed(), "no key prompt")
    assert "Access key field" in _by_id(browser, "error").text  # not "below": it is above
    _by_id(browser, "key").send_keys(site["keys"]["staff"], Keys.ENTER)
    _wait(browser, lambda d: _by_id(d, "document").is_displayed(), "the bookmark stayed empty")
    _wait(
        browser,
        lambda d: d.execute_script("return document.body.getAttribute('aria-busy')") == "false",
        "the page stayed busy",
    )
    # Every part of the address is restored: the query and ranking in the form too.
    assert _by_id(browser, "q").get_attribute("value") == "rail road maintenance"
    assert _by_id(browser, "mode").get_attribute("value") == "lexical"
    assert _by_id(browser, "doc-title").text == "Transport of spares"
    # The text once, however the windows overlapped; the passage found marked in it.
    body = _by_id(browser, "doc-chunks").text
    assert body.count("Rail is the default") == 1 and body.count("3. Rail and road") == 1
    assert body.count("closed for maintenance works") == 12
    found = _by_id(browser, "found")
    assert found.text.strip() and found.text.strip() in chunk["text"]
    assert browser.switch_to.active_element == found
    assert {m.text.lower() for m in _css(browser, "#doc-chunks mark")} >= {"rail", "road"}
    _screenshot(browser, "bookmarked-document")
    # Back keeps the query and the tag filter of the address.
    _by_id(browser, "back").click()
    _wait(browser, lambda d: _by_id(d, "results").is_displayed(), "Back did not show results")
    assert "tag=process" in browser.current_url
    assert "process" in _by_id(browser, "active-tags").text


def test_clean_text_tags_dates_and_whole_token_highlights(site: dict, browser) -> None:
    _open(browser, site, "staff")
    results = _search(browser, "ERR-4472 post-incident review record", mode="lexical")
    review = next(r for r in results if r["title"] == "Incident reviews")
    # Clean text: no emphasis markers, list items as bullets, the table as a table.
    assert "*" not in review["passage"] and "|" not in review["passage"]
    assert "Writing a post-incident review starts within two days" in review["passage"]
    assert "• Timeline first" in review["passage"]
    item = next(
        i
        for i in _css(browser, "#result-list .result")
        if i.find_element("css selector", ".result-link").text == "Incident reviews"
    )
    cells = [c.text for c in item.find_elements("css selector", ".passage table td")]
    assert cells[:4] == ["Record type", "Kept for", "Review", "6 years"]
    # Whole tokens as the lexical ranking counts them: ERR-4472 is one highlight.
    assert "ERR-4472" in review["marks"]
    assert all(m.upper() != "ERR-" for m in review["marks"])
    assert item.find_element("css selector", ".date").text == "2026-03-14"
    original = item.find_element("css selector", "a.original").get_attribute("href")
    assert original == "https://wiki.example.org/guides/incident-review"
    assert item.find_element("css selector", ".source").text == "guides/incident-review.md"
    _screenshot(browser, "clean-text")

    # A tag narrows the search to pages with it.
    tag = next(b for b in item.find_elements("css selector", "button.tag") if b.text == "incident")
    tag.click()
    _wait(browser, lambda d: "tag=incident" in d.current_url, "the tag was not added")
    _wait(
        browser,
        lambda d: (
            _by_id(d, "active-tags").is_displayed()
            and d.execute_script("return document.body.getAttribute('aria-busy')") == "false"
        ),
        "the tag filter is not shown",
    )
    titles = [t.text for t in _css(browser, "#result-list .result-link")]
    assert titles == ["Incident reviews"]
    _screenshot(browser, "tag-filter")
    _css(browser, "#active-tags button")[0].click()
    _wait(browser, lambda d: "tag=" not in d.current_url, "the tag filter was not removed")
    _wait(
        browser,
        lambda d: (
            not _by_id(d, "active-tags").is_displayed()
            and d.execute_script("return document.body.getAttribute('aria-busy')") == "false"
        ),
        "the results did not come back without the tag",
    )

    # The document view: clean text, the table as a table, the source relative.
    _css(browser, "#result-list .result-link")[0].click()
    _wait(browser, lambda d: _by_id(d, "document").is_displayed(), "the document did not open")
    text = _by_id(browser, "doc-chunks").text
    assert "*" not in text and "|" not in text
    assert "2026-03-14" in _by_id(browser, "doc-meta").text
    assert "/tmp" not in _by_id(browser, "doc-meta").text


def test_document_view_readable_on_a_phone(site: dict, browser) -> None:
    browser.set_window_size(390, 844)
    try:
        _open(browser, site, "staff")
        browser.get(site["url"] + "/#q=record+type&mode=lexical&doc=guides%2Fincident-review.md")
        _wait(browser, lambda d: _by_id(d, "document").is_displayed(), "no document")
        widths = browser.execute_script(
            "return [document.documentElement.scrollWidth, document.documentElement.clientWidth]"
        )
        assert widths[0] <= widths[1], f"the page scrolls sideways on a phone: {widths}"
        _screenshot(browser, "phone-document")
    finally:
        browser.set_window_size(1200, 900)


def test_no_script_or_policy_errors_in_the_console(site: dict, browser) -> None:
    _open(browser, site, "staff")
    _search(browser, "valve")
    assert _problems(browser) == []


@pytest.fixture(scope="module", autouse=True)
def _fresh_artifacts() -> None:
    """Screenshots of this run only."""
    for old in ARTIFACTS.glob("search-page-*.png"):
        old.unlink()
