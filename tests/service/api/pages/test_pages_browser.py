"""The demo shop and the operator view in a real browser: Debian's chromium, headless, driven by
Selenium against the app on a real uvicorn. What the page shows is checked against what the public
API answers for the same visit, and against the artifact itself.
"""

from __future__ import annotations

import httpx
from selenium.common.exceptions import StaleElementReferenceException
from selenium.webdriver.common.by import By
from selenium.webdriver.support.ui import WebDriverWait

from service.artifacts.format import load_artifact

WAIT_S = 10


def _wait(browser, condition, what: str):
    # The operator view rebuilds its tables on every refresh: an element read mid-refresh is retried.
    wait = WebDriverWait(browser, WAIT_S, poll_frequency=0.05, ignored_exceptions=(StaleElementReferenceException,))
    return wait.until(lambda d: condition(d), message=what)


def _text(browser, element_id: str) -> str:
    return browser.find_element(By.ID, element_id).text


def _recommended(browser) -> list[str]:
    return [b.get_attribute("data-item-id") for b in browser.find_elements(By.CSS_SELECTOR, "#recommendations .rec")]


def _click_and_wait(browser, button, sequence: int) -> None:
    button.click()
    _wait(browser, lambda d: _text(d, "sequence") == str(sequence), f"the answer to click {sequence}")


def _fresh_shop(browser, url: str, console) -> None:
    console(browser)  # what earlier tests left in the log
    browser.get(url + "/shop/")
    browser.execute_script("sessionStorage.clear()")  # a visit left by an earlier test
    browser.get(url + "/shop/")
    _wait(browser, lambda d: _text(d, "visit-id").startswith("shop-"), "the visit id")


def test_shop_three_clicks_show_changing_recommendations_and_who_served_them(browser, pages_server, pages_store, screenshots, console):
    server = pages_server()
    artifact = load_artifact(pages_store / "garden" / "v1")
    _fresh_shop(browser, server.url, console)
    grid = browser.find_elements(By.CSS_SELECTOR, "#grid .item")
    assert len(grid) == 60
    # The grid lists the most clicked items first, by their demo-shop names.
    top = [artifact.item_ids[i] for i in sorted(range(artifact.n_items), key=lambda i: -artifact.popularity[i])[:60]]
    assert [b.get_attribute("data-item-id") for b in grid] == top
    assert grid[0].find_element(By.CLASS_NAME, "name").text == artifact.item_names[top[0]]

    lists = []
    for n, button in enumerate(grid[3:6], start=1):
        _click_and_wait(browser, button, n)
        assert _text(browser, "served-by") == "gru"
        assert _text(browser, "fallback-reason") == "none"
        assert _text(browser, "answer-artifact") == "garden/v1"
        timing = _text(browser, "server-timing")
        assert all(part in timing for part in ("store", "model", "step", "total")), timing
        assert _text(browser, "elapsed").endswith(" ms")
        lists.append(_recommended(browser))
    assert len(lists[0]) == 8 and len({tuple(x) for x in lists}) == 3, "each click changes the list"

    # The page shows what the public API answers for this visit, names from the artifact.
    visit = _text(browser, "visit-id")
    with httpx.Client(base_url=server.url) as c:
        answer = c.get(f"/v1/sessions/{visit}/recommendations", params={"count": 8}).json()
    assert [i["item_id"] for i in answer["items"]] == lists[-1]
    shown = [e.text for e in browser.find_elements(By.CSS_SELECTOR, "#recommendations .rec .name")]
    assert shown == [artifact.item_names[i] for i in lists[-1]]
    clicked = [e.text for e in browser.find_elements(By.CSS_SELECTOR, "#clicks .id")]
    assert clicked == [b.get_attribute("data-item-id") for b in grid[3:6]]
    browser.save_screenshot(str(screenshots / "shop.png"))

    # A recommendation is itself a click; a new visit starts from nothing.
    browser.find_elements(By.CSS_SELECTOR, "#recommendations .rec")[0].click()
    _wait(browser, lambda d: _text(d, "sequence") == "4", "the click on a recommendation")
    browser.find_element(By.ID, "new-visit").click()
    _wait(browser, lambda d: _text(d, "visit-id") != visit and not _recommended(d), "a new visit")
    assert browser.find_elements(By.CSS_SELECTOR, "#clicks li") == []
    assert console(browser) == []  # no script error, no CSP violation, nothing failed to load


def test_shop_search_filters_the_grid_and_the_visit_goes_on(browser, pages_server, pages_store, console):
    server = pages_server()
    artifact = load_artifact(pages_store / "garden" / "v1")
    word = artifact.item_names[artifact.item_ids[0]].split()[0]
    _fresh_shop(browser, server.url, console)
    first = browser.find_elements(By.CSS_SELECTOR, "#grid .item")[0]
    first_id = first.get_attribute("data-item-id")
    _click_and_wait(browser, first, 1)
    before = _recommended(browser)
    box = browser.find_element(By.NAME, "q")
    box.send_keys(word)
    box.submit()
    _wait(browser, lambda d: "q=" in d.current_url, "the search")
    names = [e.text for e in browser.find_elements(By.CSS_SELECTOR, "#grid .item .name")]
    expected = sum(word.casefold() in n.casefold() or word.casefold() in i.casefold() for i, n in artifact.item_names.items())
    assert names and len(names) == min(expected, 60)
    assert all(word.casefold() in n.casefold() for n in names)
    # The search reloads the page; the visit, its clicks and its list carry over.
    _wait(browser, lambda d: _recommended(d) == before, "the visit's list again")
    assert [e.text for e in browser.find_elements(By.CSS_SELECTOR, "#clicks .id")] == [first_id]
    assert console(browser) == []


def test_one_ms_budget_shows_the_fallback_reason(browser, pages_server, kit_fault, console):
    fault = kit_fault(delay_s=0.004)  # a model step of 4 ms: it fits the default 50 ms, never 1 ms
    server = pages_server(wrap_model=fault.wrap)
    _fresh_shop(browser, server.url, console)
    grid = browser.find_elements(By.CSS_SELECTOR, "#grid .item")
    _click_and_wait(browser, grid[0], 1)
    assert _text(browser, "served-by") == "gru" and _text(browser, "fallback-reason") == "none"

    browser.find_element(By.ID, "budget").send_keys("1")
    browser.find_element(By.ID, "set-budget").click()
    _wait(browser, lambda d: _text(d, "budget-now") == "1 ms", "the budget")
    _click_and_wait(browser, grid[1], 2)
    # The model's recent steps take 4 ms, so the gate does not start it in a 1 ms budget.
    assert _text(browser, "fallback-reason") == "budget"
    assert _text(browser, "served-by") == "neighbours"
    assert "warn" in browser.find_element(By.ID, "fallback-reason").get_attribute("class")
    assert len(_recommended(browser)) == 8
    assert console(browser) == []


def test_hostile_item_ids_and_names_show_as_text(browser, pages_server, hostile, console):
    HOSTILE_IDS, HOSTILE_NAME = hostile
    # The popularity recommender answers the most clicked items: the two hostile ids.
    server = pages_server(name="hostile", recommender="popularity")
    _fresh_shop(browser, server.url, console)
    title = browser.title
    grid = browser.find_elements(By.CSS_SELECTOR, "#grid .item")
    assert [b.get_attribute("data-item-id") for b in grid[:2]] == HOSTILE_IDS  # the attribute holds the exact string
    assert grid[0].find_element(By.CLASS_NAME, "name").text == HOSTILE_NAME
    assert grid[1].find_element(By.CLASS_NAME, "id").text == HOSTILE_IDS[1]

    _click_and_wait(browser, grid[5], 1)  # answered by popularity: the hostile items first, through the script
    assert _recommended(browser)[:2] == HOSTILE_IDS
    recs = browser.find_elements(By.CSS_SELECTOR, "#recommendations .rec")
    assert recs[0].find_element(By.CLASS_NAME, "name").text == HOSTILE_NAME
    assert recs[1].find_element(By.CLASS_NAME, "id").text == HOSTILE_IDS[1]
    _click_and_wait(browser, grid[0], 2)  # a hostile id clicked: sent to the API and listed as text
    assert browser.find_elements(By.CSS_SELECTOR, "#clicks .id")[-1].text == HOSTILE_IDS[0]

    assert browser.title == title, "no injected script ran"
    assert browser.find_elements(By.CSS_SELECTOR, "main img, main b, main script") == []
    assert console(browser) == []  # an injected <img src=x> would have failed to load here


def test_operator_view_shows_the_live_artifact_and_a_breaker_that_opens(browser, pages_server, kit_fault, screenshots, sid, console):
    fault = kit_fault()
    server = pages_server(
        wrap_model=fault.wrap, model_breaker_min_calls=4, model_breaker_failure_ratio=0.5, model_breaker_cool_down_s=600.0,
    )  # fmt: skip
    with httpx.Client(base_url=server.url) as c:
        visit = sid("op")
        items = load_artifact(server.settings.artifacts / "garden" / "v1").item_ids
        for item in items[:6]:
            assert c.post(f"/v1/sessions/{visit}/clicks", json={"item_id": item}).json()["served_by"] == "gru"
        console(browser)
        browser.get(server.url + "/operator/")
        _wait(browser, lambda d: _text(d, "updated") != "–", "the first refresh")
        assert _text(browser, "live-artifact") == "garden/v1" and _text(browser, "live-recommender") == "gru"
        assert _text(browser, "ready") == "ready"
        assert _breakers(browser)["model"] == "closed"
        _wait(browser, lambda d: _table(d, "served-by-table") == {"gru": "6"}, "six answers by the GRU")

        fault.failing = True
        for item in items[6:16]:
            assert c.post(f"/v1/sessions/{visit}/clicks", json={"item_id": item}).status_code == 200
        assert c.get("/readyz").json()["breakers"]["model"] == "open"
    _wait(browser, lambda d: _breakers(d).get("model") == "open", "the model breaker shown open")
    assert _text(browser, "ready") == "degraded: model"
    assert _rows(browser, "breakers")["model"] == ("open", "bad")
    # A refresh may have read the summary before the last clicks: the next one has them all.
    _wait(browser, lambda d: _table(d, "served-by-table") == {"gru": "6", "neighbours": "10"}, "ten answers by the fallback")
    fallbacks = _table(browser, "fallbacks-table")
    assert set(fallbacks) == {"model_error", "model_unavailable"} and sum(map(int, fallbacks.values())) == 10
    assert _text(browser, "p99").endswith("ms of 50 ms budget")
    browser.save_screenshot(str(screenshots / "operator.png"))
    # The only errors: /readyz answering 503 while degraded, which the page reads and shows.
    assert [m for m in console(browser) if "/readyz" not in m or "503" not in m] == []


def _rows(browser, tbody_id: str) -> dict[str, tuple[str, str]]:
    """{key: (value cell's text, its class)}, read in one script call: never half a refresh."""
    script = """const out = {};
        document.querySelectorAll('#' + arguments[0] + ' tr[data-key]').forEach(function (r) {
          out[r.dataset.key] = [r.cells[1].textContent, r.cells[1].className];
        });
        return out;"""
    return {k: (v[0], v[1]) for k, v in browser.execute_script(script, tbody_id).items()}


def _table(browser, tbody_id: str) -> dict[str, str]:
    return {k: text for k, (text, _) in _rows(browser, tbody_id).items()}


def _breakers(browser) -> dict[str, str]:
    return _table(browser, "breakers")
