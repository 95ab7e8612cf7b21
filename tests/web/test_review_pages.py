"""The review pages in a real browser (and as plain HTML forms, without JavaScript), against
the app's own REST API as the reference: the case queue, a review cycle on the account
page, scopes checked on the server, a conflicting change, suppressions and the figures.

The cases come from the real window close of the fixture sample (``site`` in conftest.py).
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Iterator
from contextlib import contextmanager
from urllib.parse import quote, urlsplit

import httpx
import pytest
from selenium.webdriver.common.by import By
from selenium.webdriver.common.keys import Keys
from selenium.webdriver.support.ui import Select

from rolewatch.clock import now_micros
from rolewatch.store.keys import create_key

from .conftest import api_get, screenshot, sign_in, wait_for
from .signin import sign_in_http

pytestmark = pytest.mark.browser
_TOKEN = re.compile(r'name="token" value="([0-9a-f]+)"')


@pytest.fixture(scope="module")
def reviewers(site):
    """Two reviewer keys with display names, added to ``site.keys``."""
    for who, name in (("review", "Rita Reviewer"), ("review2", "Sol Second")):
        if who not in site.keys:
            site.keys[who] = create_key(
                site.engine, ["review"], label=f"web {who}", now_us=now_micros(), name=name
            )[1]
    return site.keys


def _css(driver, selector):
    return driver.find_elements(By.CSS_SELECTOR, selector)


def _api(site, method: str, path: str, who: str, **kwargs) -> httpx.Response:
    headers = {"Authorization": f"Bearer {site.keys[who]}"}
    return httpx.request(method, f"{site.url}{path}", headers=headers, timeout=30, **kwargs)


def _open_case(site, who: str = "read") -> dict:
    found = api_get(site, "/v1/cases?state=open", who)["cases"]
    assert found, "the sample's window closes opened no case"
    return found[-1]


def test_queue_lists_cases_like_the_api(page, site):
    sign_in(page, site)
    page.get(f"{site.url}/")
    assert page.find_element(By.TAG_NAME, "h1").text == "Cases"
    expected = api_get(site, "/v1/cases?state=open&state=in_review")["cases"]
    rows = _css(page, "table.cases tbody tr")
    assert len(rows) == len(expected) > 0
    shown = [row.find_element(By.CSS_SELECTOR, "a.account-link").text for row in rows]
    assert shown == [case["account"] for case in expected]
    first = rows[0].text
    assert f"{expected[0]['latest_score']:.2f}" in first
    assert expected[0]["role_after"]["name"] in first
    screenshot(page, "cases-queue")

    # The filters, from the keyboard: pick "any state" and press Enter in the score field.
    state = page.find_element(By.ID, "f-state")
    state.send_keys("any")
    score = page.find_element(By.ID, "f-min-score")
    score.send_keys(str(expected[0]["latest_score"]), Keys.ENTER)
    wait_for(lambda: "min_score=" in page.current_url, "the filter form was not sent")
    rows = _css(page, "table.cases tbody tr")
    assert [r.find_element(By.CSS_SELECTOR, "a.account-link").text for r in rows] == [
        case["account"]
        for case in api_get(site, f"/v1/cases?min_score={expected[0]['latest_score']}")["cases"]
    ]


def test_a_review_cycle_on_the_account_page(page, site, reviewers):
    case = _open_case(site)
    account_url = f"{site.url}/accounts/{quote(case['account'], safe='')}?case={case['id']}"
    sign_in(page, site, "review")
    page.get(account_url)
    panel = page.find_element(By.ID, "case")
    assert f"Case {case['id']}" in panel.text and "open" in panel.text
    # the case's alerts read as their headlines, the API's text
    timeline = api_get(site, f"/v1/cases/{case['id']}")["alerts"]
    shown = [cell.text for cell in panel.find_elements(By.CSS_SELECTOR, "td.headline")]
    assert shown == [alert["headline"] for alert in timeline]
    assert all(alert["headline"] for alert in timeline)

    page.find_element(By.CSS_SELECTOR, "#case button[data-move='in_review']").click()
    wait_for(lambda: "done=in_review" in page.current_url, "starting the review did not redirect")
    assert urlsplit(page.current_url).path.startswith("/accounts/")
    facts = page.find_element(By.CSS_SELECTOR, "#case .case-facts").text
    assert "Rita Reviewer" in facts  # starting a review takes the case

    # A note, then a dismissal made from the keyboard alone.
    note = page.find_element(By.ID, f"note-{case['id']}")
    note.send_keys("Counterparts are the market's couriers.")
    page.find_element(By.CSS_SELECTOR, "form.review-note button").click()
    wait_for(lambda: "done=note" in page.current_url, "the note was not added")
    reason = page.find_element(By.ID, f"dismiss-reason-{case['id']}")
    reason.send_keys("known")  # type-ahead selects "known account"
    reason.send_keys(Keys.TAB, "Courier hub, checked with the operator.")
    page.switch_to.active_element.send_keys(Keys.TAB, Keys.ENTER)
    wait_for(lambda: "done=dismissed" in page.current_url, "the dismissal was not sent")

    current = api_get(site, f"/v1/cases/{case['id']}")
    assert current["state"] == "dismissed"
    assert current["last_decision"]["reason"] == "known_account"
    assert current["last_decision"]["text"] == "Courier hub, checked with the operator."
    assert current["last_decision"]["by"]["name"] == "Rita Reviewer"
    history = page.find_element(By.CSS_SELECTOR, "#case ol.history").text
    assert "Rita Reviewer" in history and "known account" in history
    assert "Counterparts are the market's couriers." in history
    screenshot(page, "case-on-account-page")

    page.find_element(By.CSS_SELECTOR, "#case button[data-move='open']").click()
    wait_for(lambda: "done=open" in page.current_url, "reopening did not redirect")
    assert api_get(site, f"/v1/cases/{case['id']}")["state"] == "open"


@contextmanager
def _signed_in(site, scope: str) -> Iterator[httpx.Client]:
    """An HTTP client signed in through the sign-in form with the ``scope`` key."""
    with httpx.Client(base_url=site.url) as client:
        answer = sign_in_http(client, site.keys[scope])
        assert answer.status_code == 303, answer.text[:300]
        yield client


def _form_token(client: httpx.Client, path: str) -> str:
    page = client.get(path)
    assert page.status_code == 200, page.text[:300]
    return _TOKEN.search(page.text).group(1)


def test_forms_work_without_javascript_and_scopes_are_checked_on_the_server(site, reviewers):
    case = _open_case(site)
    path = f"/cases/{case['id']}"
    with _signed_in(site, "read") as reader:
        token = _form_token(reader, path)
        assert "data-move" not in reader.get(path).text  # no review buttons for a read key
        refused = reader.post(
            f"{path}/state", data={"version": case["version"], "state": "confirmed", "token": token}
        )
        assert refused.status_code == 403 and "review scope" in refused.text
        noted = reader.post(f"{path}/notes", data={"text": "read-only remark", "token": token})
        assert noted.status_code == 303
    with _signed_in(site, "review") as rev:
        forged = rev.post(
            f"{path}/state", data={"version": case["version"], "state": "confirmed", "token": "x"}
        )
        assert forged.status_code == 403 and "form expired" in forged.text
        token = _form_token(rev, path)
        sent = rev.post(
            f"{path}/state",
            data={"version": case["version"], "state": "confirmed", "token": token},
        )
        assert sent.status_code == 303 and sent.headers["location"].endswith("done=confirmed#case")
    after = api_get(site, path.replace("/cases", "/v1/cases"))
    assert after["state"] == "confirmed"
    notes = [e for e in after["history"] if e["action"] == "note"]
    assert notes[-1]["text"] == "read-only remark"
    assert notes[-1]["by"]["key_id"] == site.keys["read"].split("_")[1]
    assert (
        _api(
            site,
            "PATCH",
            f"/v1/cases/{case['id']}",
            "review",
            json={"version": after["version"], "state": "open"},
        ).status_code
        == 200
    )


def test_a_conflicting_change_is_refused_and_the_text_kept(page, site, reviewers):
    case = _open_case(site)
    sign_in(page, site, "review")
    page.get(f"{site.url}/cases/{case['id']}")
    page.find_element(By.ID, f"move-text-{case['id']}").send_keys("Looks like a takeover.")
    # Meanwhile a second reviewer takes the case over the API.
    taken = _api(
        site,
        "PATCH",
        f"/v1/cases/{case['id']}",
        "review2",
        json={"version": case["version"], "state": "in_review"},
    )
    assert taken.status_code == 200
    page.find_element(By.CSS_SELECTOR, "#case button[data-move='confirmed']").click()
    error = wait_for(lambda: _css(page, "#case-error"), "no conflict message was shown")[0].text
    assert "Sol Second" in error and "in review" in error
    assert page.find_element(By.ID, f"move-text-{case['id']}").get_attribute("value") == (
        "Looks like a takeover."
    )
    assert api_get(site, f"/v1/cases/{case['id']}")["state"] == "in_review"
    screenshot(page, "case-conflict")
    page.get_log("browser")  # the refused form (409) is logged by the browser, as expected
    current = api_get(site, f"/v1/cases/{case['id']}")
    assert (
        _api(
            site,
            "PATCH",
            f"/v1/cases/{case['id']}",
            "review2",
            json={"version": current["version"], "state": "open"},
        ).status_code
        == 200
    )


def test_suppressions_page_adds_and_lifts(page, site, reviewers):
    sign_in(page, site, "read")
    page.get(f"{site.url}/suppressions")
    assert not _css(page, "form.suppression-form")  # a read key sees the list only
    sign_in(page, site, "review")
    page.get(f"{site.url}/suppressions")
    Select(page.find_element(By.ID, "s-kind")).select_by_value("pattern")
    page.find_element(By.ID, "s-value").send_keys("courier-*")
    page.find_element(By.ID, "s-reason").send_keys("The market's own couriers")
    # A date field's typing order follows the browser's locale; set its value directly.
    page.execute_script("arguments[0].value = '2099-12-31'", page.find_element(By.ID, "s-expires"))
    page.find_element(By.CSS_SELECTOR, "form.suppression-form button").click()
    wait_for(lambda: "done=added" in page.current_url, "the suppression was not added")
    listed = api_get(site, "/v1/suppressions")["suppressions"]
    entry = next(e for e in listed if e["value"] == "courier-*")
    assert entry["kind"] == "pattern" and entry["expires"] == "2100-01-01T00:00:00Z"
    assert entry["created_by"]["name"] == "Rita Reviewer"
    row = next(r for r in _css(page, "table.suppressions tbody tr") if "courier-*" in r.text)
    assert "in force" in row.text
    screenshot(page, "suppressions")
    row.find_element(By.CSS_SELECTOR, "button").click()
    wait_for(lambda: "done=lifted" in page.current_url, "lifting did not redirect")
    lifted = api_get(site, "/v1/suppressions?all=true")["suppressions"]
    assert next(e for e in lifted if e["id"] == entry["id"])["active"] is False


def test_figures_page_matches_the_api(page, site, reviewers):
    # Decide two cases over the API, so the page has reviewed alerts to count.
    open_cases = api_get(site, "/v1/cases?state=open")["cases"]
    assert len(open_cases) >= 2
    for case, body in zip(
        open_cases,
        ({"state": "confirmed"}, {"state": "dismissed", "reason": "expected_behaviour"}),
        strict=False,
    ):
        answer = _api(
            site,
            "PATCH",
            f"/v1/cases/{case['id']}",
            "review2",
            json={"version": case["version"], **body},
        )
        assert answer.status_code == 200, answer.text
    sign_in(page, site, "read")
    page.get(f"{site.url}/review/stats")
    figures = api_get(site, "/v1/review/stats")
    totals = {
        item.find_element(By.TAG_NAME, "dt").text: item.find_element(By.TAG_NAME, "dd").text
        for item in _css(page, "dl.totals > div")
    }
    assert totals["Raised"] == str(figures["totals"]["raised"])
    assert totals["Reviewed"] == str(figures["totals"]["reviewed"])
    assert totals["Confirmed"] == str(figures["totals"]["confirmed"])
    assert figures["totals"]["reviewed"] >= 2
    assert totals["Precision of reviewed alerts"] == f"{figures['totals']['precision']:.0%}"
    windows = _css(page, "table.figures")[0].find_elements(By.CSS_SELECTOR, "tbody tr")
    assert len(windows) == len(figures["windows"])
    screenshot(page, "review-figures")
    link = page.find_element(By.LINK_TEXT, "per window").get_attribute("href")
    with _signed_in(site, "read") as client:
        table = list(csv.DictReader(io.StringIO(client.get(link).text)))
    assert [int(row["raised"]) for row in table] == [w["raised"] for w in figures["windows"]]
