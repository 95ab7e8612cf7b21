"""The web pages in a real browser, against the app's own REST API and store as the reference.

What is compared with what: page contents are checked against the REST API of the same
running app (``/v1/alerts``, ``/v1/roles``, ``/v1/accounts/{account}/roles``), which the
service core tests separately, and against ``rolewatch.store.queries``; the chart's
geometry is checked against the mixtures the API reports. No value is hard-coded.
"""

from __future__ import annotations

from urllib.parse import parse_qs, quote, unquote, urlsplit

import pytest
from selenium.webdriver.common.by import By

from rolewatch.engine.naming import format_value
from rolewatch.engine.readable import MEASURE_LABELS, MEASURES
from rolewatch.store import queries

from .conftest import HOSTILE_ACCOUNT, api_get, screenshot, sign_in, wait_for

pytestmark = pytest.mark.browser


def _css(driver, selector):
    return driver.find_elements(By.CSS_SELECTOR, selector)


def _error_text(driver) -> str:
    """The page's error message, once the page showing one has loaded."""
    found = wait_for(lambda: _css(driver, ".message.error"), "no error message was shown")
    return found[0].text


def _footer_says_leads(driver) -> None:
    footer = driver.find_element(By.CSS_SELECTOR, "footer.notice").text
    assert "leads for human review, not verdicts" in footer


def _newest_alert(site) -> dict:
    alerts = api_get(site, "/v1/alerts?limit=200")["alerts"]
    assert alerts, "the sample produced no alerts: the pages under test need some"
    return alerts[0]


def _session_cookies(page) -> list[dict]:
    """The browser's sign-in session cookie, if any (the sign-in form sets its own token
    cookie, scoped to /signin)."""
    return [cookie for cookie in page.get_cookies() if cookie["name"] == "rolewatch_session"]


def test_pages_require_sign_in(page, site):
    for path in ("/", "/alerts", "/roles", "/accounts/m-00001"):
        page.get(site.url + path)
        parts = urlsplit(page.current_url)
        assert parts.path == "/signin", f"{path} did not redirect to the sign-in page"
        assert unquote(parse_qs(parts.query)["next"][0]) == path
    assert page.find_element(By.TAG_NAME, "h1").text == "Sign in"
    assert _session_cookies(page) == []
    _footer_says_leads(page)
    screenshot(page, "signin")

    # A wrong key is refused with a message and sets no cookie.
    page.find_element(By.ID, "key").send_keys("rwk_000000000000_not-a-real-secret")
    page.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
    assert "not valid" in _error_text(page)
    assert _session_cookies(page) == []

    # An ingest-only key lacks the read scope.
    page.find_element(By.ID, "key").send_keys(site.keys["ingest"])
    page.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
    wait_for(lambda: "read scope" in _error_text(page), "an ingest-only key was not refused")
    page.get_log("browser")  # the two refusals (401) are logged by the browser, as expected


def test_sign_in_cookie_and_sign_out(page, site):
    page.get(f"{site.url}/signin?next=%2Froles")
    page.find_element(By.ID, "key").send_keys(site.keys["read"])
    page.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
    wait_for(
        lambda: urlsplit(page.current_url).path == "/roles", "sign-in did not return to /roles"
    )
    (cookie,) = _session_cookies(page)
    assert cookie["httpOnly"] is True
    assert cookie["sameSite"] == "Strict"
    assert cookie["secure"] is False  # public_url is http:// here
    # The page never shows the secret, only the public key id.
    assert site.keys["read"] not in page.page_source
    assert site.keys["read"].split("_")[1] in page.find_element(By.CSS_SELECTOR, ".who").text

    page.find_element(By.CSS_SELECTOR, "form.signout button").click()
    wait_for(
        lambda: urlsplit(page.current_url).path == "/signin", "sign-out did not land on /signin"
    )
    assert _session_cookies(page) == []
    page.get(f"{site.url}/alerts")
    assert urlsplit(page.current_url).path == "/signin"


def test_alert_queue_lists_alerts_newest_first(page, site):
    sign_in(page, site)
    page.get(f"{site.url}/alerts")
    expected = api_get(site, "/v1/alerts?limit=50")["alerts"]
    rows = _css(page, "table.queue tbody tr")
    assert len(rows) == len(expected) > 0
    shown = [row.find_element(By.CSS_SELECTOR, "a.account-link").text for row in rows]
    assert shown == [alert["account"] for alert in expected]
    created = [alert["created"] for alert in expected]
    assert created == sorted(created, reverse=True), "the API's order is not newest first"
    first = rows[0].text
    assert f"{expected[0]['score']:.2f}" in first
    assert expected[0]["role_after"]["name"] in first
    # each row's headline is the API's, and none repeats a role without saying what moved
    headlines = [row.find_element(By.CSS_SELECTOR, "td.headline").text for row in rows]
    assert headlines == [alert["headline"] for alert in expected]
    for alert in expected:
        after = alert["role_after"]["name"]
        assert not alert["headline"].startswith(f"{after} → {after}"), alert["headline"]
    _footer_says_leads(page)
    screenshot(page, "alerts")


def test_alert_queue_filters_by_score_and_period(page, site):
    sign_in(page, site)
    alerts = api_get(site, "/v1/alerts?limit=200")["alerts"]
    scores = sorted(alert["score"] for alert in alerts)
    cut = scores[len(scores) // 2]
    page.get(f"{site.url}/alerts")
    page.find_element(By.ID, "min_score").send_keys(f"{cut:.4f}")
    page.find_element(By.CSS_SELECTOR, "form.filters button").click()
    wait_for(lambda: "min_score=" in page.current_url, "the filter form was not submitted")
    rows = _css(page, "table.queue tbody tr")
    expected = [alert for alert in alerts if alert["score"] >= float(f"{cut:.4f}")]
    assert len(rows) == len(expected) and 0 < len(rows) < len(alerts)

    # The period bounds the window end; one day holding the newest window's end.
    end_day = alerts[0]["window_end"][:10]
    page.get(f"{site.url}/alerts?date_from={end_day}&date_to={end_day}")
    rows = _css(page, "table.queue tbody tr")
    same_end = [alert for alert in alerts if alert["window_end"][:10] == end_day]
    assert len(rows) == len(same_end) > 0

    # A bad field is reported and ignored; the good ones still apply.
    page.get(f"{site.url}/alerts?min_score=lots&date_from={end_day}&date_to={end_day}")
    assert "not a number" in _error_text(page)
    assert len(_css(page, "table.queue tbody tr")) == len(same_end)


def test_alert_row_links_to_its_account(page, site):
    sign_in(page, site)
    newest = _newest_alert(site)
    page.get(f"{site.url}/alerts")
    page.find_element(By.CSS_SELECTOR, "table.queue tbody tr a.account-link").click()
    wait_for(lambda: "/accounts/" in page.current_url, "the row link did not open an account")
    parts = urlsplit(page.current_url)
    assert unquote(parts.path) == f"/accounts/{newest['account']}"
    assert parse_qs(parts.query)["window"] == [str(newest["window_id"])]
    assert page.find_element(By.CSS_SELECTOR, "h1 .account-id").text == newest["account"]
    heading = page.find_element(By.ID, "evidence-heading").text
    assert newest["window_start"][:10] in heading and newest["window_end"][:10] in heading


def test_account_chart_has_one_band_per_role(page, site):
    sign_in(page, site)
    newest = _newest_alert(site)
    account = newest["account"]
    roles = api_get(site, "/v1/roles")["roles"]
    history = api_get(site, f"/v1/accounts/{quote(account, safe='')}/roles")["windows"]
    page.get(f"{site.url}/accounts/{quote(account, safe='')}")

    bands = _css(page, "svg.mixture [data-role]")
    assert len(bands) == len(roles) == len(queries.list_roles(site.engine)["roles"])
    assert sorted(int(b.get_attribute("data-role")) for b in bands) == sorted(
        r["id"] for r in roles
    )
    legend = [item.text for item in _css(page, ".legend li")]
    for role in roles:
        assert role["name"] in legend, f"role {role['name']!r} missing from the legend"

    # Each band's height in a window is the role's share of the mixture the API reports.
    plot_height = float(
        page.find_element(By.CSS_SELECTOR, "svg.mixture").get_attribute("data-plot-height")
    )
    mixtures = {entry["window_id"]: entry["mixture"] for entry in history}
    checked = 0
    for band in bands:
        role = band.get_attribute("data-role")
        for rect in band.find_elements(By.CSS_SELECTOR, "rect[data-window]"):
            share = mixtures[int(rect.get_attribute("data-window"))][role]
            assert float(rect.get_attribute("height")) == pytest.approx(
                share * plot_height, abs=0.02
            )
            checked += 1
    assert checked >= len(history)
    # Columns: one per closed window; alert windows are marked.
    assert len(_css(page, "svg.mixture a.hit")) == len(queries.list_windows(site.engine))
    alert_windows = {
        a["window_id"] for a in api_get(site, f"/v1/alerts?account={quote(account)}")["alerts"]
    }
    assert len(_css(page, "svg.mixture path.alert-marker")) == len(alert_windows) > 0
    # Activity under it: one pair of bars per active window.
    assert len(_css(page, "svg.activity rect.out")) == len(history)
    _footer_says_leads(page)
    screenshot(page, "account")


def test_selecting_a_window_shows_its_evidence(page, site):
    sign_in(page, site)
    newest = _newest_alert(site)
    account = newest["account"]
    history = api_get(site, f"/v1/accounts/{quote(account, safe='')}/roles")["windows"]
    quiet = [
        entry
        for entry in history
        if entry["window_id"] != newest["window_id"] and entry["dominant_role"] is not None
    ]
    assert quiet, "the alerted account needs another active window for this test"
    other = quiet[-1]

    # Without JavaScript's help: the ?window= query selects a window with no alert.
    page.get(f"{site.url}/accounts/{quote(account, safe='')}?window={other['window_id']}")
    evidence = page.find_element(By.ID, "evidence")
    assert "No alert in this window" in evidence.text
    membership = evidence.find_element(By.CSS_SELECTOR, "dl.membership").text
    assert other["dominant_role"]["name"] in membership
    assert other["status"].replace("_", " ") in membership
    screenshot(page, "account-window-without-alert")

    # Clicking the alert window's column swaps in its evidence (JavaScript enhancement).
    page.find_element(
        By.CSS_SELECTOR, f"svg.mixture a.hit[data-window='{newest['window_id']}']"
    ).click()
    wait_for(
        lambda: "Alert" in page.find_element(By.ID, "evidence").text,
        "the evidence panel did not show the alert",
    )
    assert parse_qs(urlsplit(page.current_url).query)["window"] == [str(newest["window_id"])]
    evidence = page.find_element(By.ID, "evidence")
    alert = queries.get_alert(site.engine, newest["id"])
    moves = evidence.find_elements(
        By.XPATH, ".//table[caption='Features that moved most']/tbody/tr"
    )
    assert len(moves) == max(len(alert["evidence"]["feature_moves"]), 1)
    counterparts = evidence.find_elements(By.CSS_SELECTOR, "table.counterparts tbody tr")
    assert len(counterparts) == max(len(alert["evidence"]["top_counterparts"]), 1)
    new_flags = evidence.find_elements(By.CSS_SELECTOR, "table.counterparts .badge.new")
    assert len(new_flags) == sum(1 for c in alert["evidence"]["top_counterparts"] if c["new"])
    ids = [item.text for item in evidence.find_elements(By.CSS_SELECTOR, ".ids code")]
    assert ids == alert["evidence"]["sample_event_ids"]
    selected = page.find_element(By.CSS_SELECTOR, ".windows tr.selected th").text
    assert newest["window_start"][:10] in selected
    screenshot(page, "account-alert-evidence")

    # Back goes to the previous window again.
    page.back()
    wait_for(
        lambda: "No alert in this window" in page.find_element(By.ID, "evidence").text,
        "going back did not restore the previous window",
    )


def test_a_window_with_too_little_activity_shows_no_role(page, site):
    # The reference: the store's own memberships, read through rolewatch.store.queries'
    # engine (an account the pipeline found too little structure in, in some window).
    import sqlalchemy as sa

    from rolewatch.store.schema import memberships

    with site.engine.connect() as connection:
        row = connection.execute(
            sa.select(memberships.c.account, memberships.c.window_id)
            .where(memberships.c.status == "too_little")
            .limit(1)
        ).first()
    assert row is not None, "the sample holds accounts with too little activity"
    account, window_id = row
    history = api_get(site, f"/v1/accounts/{quote(account, safe='')}/roles")["windows"]
    entry = next(e for e in history if e["window_id"] == window_id)
    assert entry["dominant_role"] is None and entry["mixture"] == {}
    sign_in(page, site)
    page.get(f"{site.url}/accounts/{quote(account, safe='')}?window={window_id}")
    membership = page.find_element(By.CSS_SELECTOR, "#evidence dl.membership").text
    assert "too little activity" in membership and "role 0" not in membership
    row_text = page.find_element(By.CSS_SELECTOR, ".windows tr.selected").text
    assert "too little activity" in row_text


def test_account_ids_are_shown_as_text(page, site):
    sign_in(page, site)
    page.get(f"{site.url}/accounts/{quote(HOSTILE_ACCOUNT, safe='')}")
    assert page.find_element(By.CSS_SELECTOR, "h1 .account-id").text == HOSTILE_ACCOUNT
    assert page.title != "1", "markup in an account id ran in the page"
    assert _css(page, "h1 img") == []
    page.get(f"{site.url}/accounts/no-such-member")
    assert page.find_element(By.TAG_NAME, "h1").text == "Account not found"
    page.get_log("browser")  # the 404 answer is logged by the browser, as expected


def test_role_catalogue_matches_the_api(page, site):
    sign_in(page, site)
    roles = api_get(site, "/v1/roles")["roles"]
    page.get(f"{site.url}/roles")
    cards = _css(page, "article.role")
    assert len(cards) == len(roles)
    for card, role in zip(cards, roles, strict=True):
        assert card.find_element(By.CSS_SELECTOR, ".role-name").text == role["name"]
        assert role["description"] in card.find_element(By.CSS_SELECTOR, ".description").text
    # Dominant-role counts add up to the accounts active in the latest window.
    latest = max(queries.list_windows(site.engine), key=lambda w: w["end_us"])
    counts = [
        int(c.find_element(By.CSS_SELECTOR, ".holders strong").text.replace(",", "")) for c in cards
    ]
    assert sum(counts) == latest["account_count"]
    assert _css(page, "form.rename") == [], "a read key must not see the rename form"
    # the profile: every readable measure, the role's average beside the population's
    for card, role in zip(cards, roles, strict=True):
        measures = role["profile"]["measures"]
        rows = card.find_elements(By.CSS_SELECTOR, "table.profile tbody tr")
        assert len(rows) == len(measures) == len(MEASURES)
        for row, name in zip(rows, MEASURES, strict=True):
            cells = [cell.text for cell in row.find_elements(By.CSS_SELECTOR, "td.num")]
            assert row.find_element(By.TAG_NAME, "th").text == MEASURE_LABELS[name]
            assert cells == [
                format_value(name, measures[name]["mean"]),
                format_value(name, measures[name]["population"]),
            ]
    # holders over time: one bar per window measured against the basis
    measured = [w for w in queries.list_windows(site.engine) if w["account_count"]]
    bars = cards[0].find_elements(By.CSS_SELECTOR, "svg.holders-chart rect")
    assert 0 < len(bars) <= len(measured)
    assert len(_css(page, ".transitions .into")) == len(cards)
    _footer_says_leads(page)
    screenshot(page, "roles")


def test_rename_in_place_needs_admin(page, site):
    role = api_get(site, "/v1/roles")["roles"][0]
    original = role["name"]
    new_name = "weekend <b>seller</b> & co"
    try:
        sign_in(page, site, "admin")
        page.get(f"{site.url}/roles")
        field = page.find_element(By.ID, f"rename-{role['id']}")
        assert page.find_element(By.CSS_SELECTOR, f"label[for='rename-{role['id']}']").text
        field.clear()
        field.send_keys(new_name)
        page.find_element(By.CSS_SELECTOR, f"#role-{role['id']} form.rename button").click()
        wait_for(lambda: "renamed=" in page.current_url, "the rename did not redirect")
        shown = page.find_element(By.CSS_SELECTOR, f"#role-{role['id']} .role-name")
        assert shown.text == new_name  # text, not markup
        assert shown.find_elements(By.TAG_NAME, "b") == []
        assert "renamed" in page.find_element(By.CSS_SELECTOR, ".message.ok").text
        renamed = {r["id"]: r["name"] for r in api_get(site, "/v1/roles")["roles"]}
        assert renamed[role["id"]] == new_name
        screenshot(page, "roles-admin")

        # A forged form without the per-key token is refused.
        page.execute_script(
            "const form = document.querySelector('#role-' + arguments[0] + ' form.rename');"
            "form.elements.token.value = 'x'; form.elements.name.value = 'forged name';",
            role["id"],
        )
        page.find_element(By.CSS_SELECTOR, f"#role-{role['id']} form.rename button").click()
        assert "expired" in _error_text(page)
        assert {r["id"]: r["name"] for r in api_get(site, "/v1/roles")["roles"]}[
            role["id"]
        ] == new_name
        page.get_log("browser")  # the 403 answer is logged by the browser; it is expected here
    finally:
        queries.rename_role(site.engine, role["id"], original)
