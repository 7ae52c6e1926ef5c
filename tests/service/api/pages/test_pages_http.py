"""The pages over plain HTTP: off by default (nothing mounted), the Content-Security-Policy and
escaping of every page, the search and names routes' bounds, the summary's numbers against the
answers sent, and the report links.
"""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

import pytest

from tests._support.servers import serve_in_thread, shop_settings

PAGES = ("/shop/", "/operator/")


class _Markup(HTMLParser):
    """Collects what a strict CSP forbids or must allow: scripts, style elements and attributes, handlers."""

    def __init__(self) -> None:
        super().__init__()
        self.scripts: list[dict[str, str | None]] = []
        self.inline: list[str] = []
        self.stylesheets: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "script":
            self.scripts.append(a)
            self._in_script = True
        if tag == "style":
            self.inline.append("<style>")
        if tag == "link" and a.get("rel") == "stylesheet":
            self.stylesheets.append(a.get("href") or "")
        self.inline += [f"{tag} {k}" for k in a if k == "style" or k.startswith("on")]

    def handle_endtag(self, tag: str) -> None:
        self._in_script = self._in_script and tag != "script"

    def handle_data(self, data: str) -> None:
        if self._in_script and data.strip():
            self.inline.append("inline script")


def test_pages_are_not_mounted_by_default(model_store: Path) -> None:
    with serve_in_thread(shop_settings(model_store, "memory", tag="p")) as server, server.client() as c:
        for path in (*PAGES, "/shop/names", "/operator/summary.json", "/pages/static/pages.js"):
            assert c.get(path).status_code == 404, path
        assert c.post("/v1/sessions/off-1/clicks", json={"item_id": "sku-000001"}).status_code == 200


def test_every_page_has_a_strict_policy_and_no_inline_script_or_style(pages_server) -> None:
    server = pages_server()
    with server.client() as c:
        for path in PAGES:
            r = c.get(path)
            assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
            # CSP Level 3 (W3C): without 'unsafe-inline' no inline script, handler or style runs.
            policy = dict(p.strip().split(" ", 1) for p in r.headers["content-security-policy"].split(";"))
            assert policy["default-src"] == "'none'" and policy["script-src"] == "'self'" and policy["style-src"] == "'self'"
            assert policy["frame-ancestors"] == "'none'" and "unsafe" not in r.headers["content-security-policy"]
            assert r.headers["x-content-type-options"] == "nosniff"
            markup = _Markup()
            markup.feed(r.text)
            assert markup.inline == [], path
            assert [s.get("src") for s in markup.scripts] == ["/pages/static/pages.js"]
            assert markup.stylesheets == ["/pages/static/pages.css"]
        for asset, kind in (("pages.js", "javascript"), ("pages.css", "text/css")):
            r = c.get(f"/pages/static/{asset}")
            assert r.status_code == 200 and kind in r.headers["content-type"]
        script = c.get("/pages/static/pages.js").text
        # No API that parses a string as HTML (WHATWG DOM/HTML): text goes in by textContent only.
        for sink in (".innerHTML", ".outerHTML", "insertAdjacentHTML", "document.write", "eval(", "new Function"):
            assert sink not in script, sink


def test_hostile_strings_arrive_escaped(pages_server, hostile) -> None:
    ids, name = hostile
    with pages_server(name="hostile").client() as c:
        html = c.get("/shop/").text
        assert "<script>document" not in html and "<b>Rake" not in html and "<img" not in html
        assert "&lt;script&gt;document.title=&#34;owned&#34;&lt;/script&gt;" in html  # Jinja2's escape of the id
        echoed = c.get("/shop/", params={"q": "<script>x</script>"}).text
        assert "<script>x</script>" not in echoed and "&lt;script&gt;x&lt;/script&gt;" in echoed
        names = c.get("/shop/names", params={"id": ids}).json()["names"]  # JSON carries them exactly; the page's script writes them as text
        assert names[ids[0]] == name and set(names) == set(ids)


def test_search_and_names_are_bounded(pages_server, pages_store: Path) -> None:
    from service.artifacts.format import load_artifact

    artifact = load_artifact(pages_store / "garden" / "v1")
    with pages_server().client() as c:
        item = artifact.item_ids[7]
        assert f'data-item-id="{item}"' in c.get("/shop/", params={"q": item.lower()}).text  # any case
        assert "No item matches" in c.get("/shop/", params={"q": "no such thing"}).text
        r = c.get("/shop/", params={"q": "x" * 101})
        assert r.status_code == 422 and r.json()["field"] == "q"
        names = c.get("/shop/names", params={"id": [item, "unknown-item"]}).json()["names"]
        assert names == {item: artifact.item_names[item]}
        r = c.get("/shop/names", params={"id": [f"i{n}" for n in range(101)]})
        assert r.status_code == 422 and r.json()["field"] == "id" and "at most 100" in r.json()["message"]


def test_an_artifact_without_names_shows_ids(model_store: Path) -> None:
    settings = shop_settings(model_store, "memory", tag="p", pages=True)
    with serve_in_thread(settings) as server, server.client() as c:
        html = c.get("/shop/").text
        assert "has no item names" in html and '<span class="name">sku-' in html
        assert c.get("/shop/names", params={"id": "sku-000001"}).json() == {"names": {}}


def test_summary_counts_the_answers_sent(pages_server, sid) -> None:
    server = pages_server()
    with server.client() as c:
        first = c.get("/operator/summary.json").json()
        assert first["answers_in_window"] == 0 and first["p99_ms"] is None and first["budget_ms"] == 50
        visit = sid("sum")
        for n in range(5):
            c.post(f"/v1/sessions/{visit}/clicks", json={"item_id": f"GS-{n:05d}"})
        c.get(f"/v1/sessions/{visit}/recommendations", params={"budget_ms": 1})
        summary = c.get("/operator/summary.json").json()
        by = summary["answers_by_served_by"]
        assert summary["answers_in_window"] == sum(by.values()) == 6 and by["gru"] >= 5
        assert summary["fallbacks_by_reason"] == ({} if by["gru"] == 6 else {"budget": 1})
        assert 0 < summary["p50_ms"] <= summary["p99_ms"] and summary["artifact"] == "garden/v1"
        metrics = c.get("/metrics").text  # the same figures the Prometheus scrape shows
        assert 'cairn_recommendation_duration_seconds_count{served_by="gru"} ' + str(by["gru"]) in metrics


def test_reports_are_linked_when_their_files_exist(pages_server, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)  # the service reads reports/ from its working folder, as `cairn loadtest` writes it
    with pages_server().client() as c:
        assert "No reports yet" in c.get("/operator/").text
        assert c.get("/operator/reports/loadtest").status_code == 404
        (tmp_path / "reports" / "loadtest").mkdir(parents=True)
        (tmp_path / "reports" / "loadtest" / "loadtest.md").write_text("# Load test\n\np99 12 ms\n", encoding="utf-8")
        page = c.get("/operator/").text
        assert '<a href="/operator/reports/loadtest">reports/loadtest/loadtest.md</a>' in page
        r = c.get("/operator/reports/loadtest")
        assert r.status_code == 200 and r.text.startswith("# Load test") and r.headers["content-type"].startswith("text/markdown")
        r = c.get("/operator/reports/secrets")  # only the keys of the fixed table name files
        assert r.status_code == 404 and r.json()["field"] == "key"
        assert c.get("/operator/reports/..%2F..%2Fetc%2Fpasswd").status_code == 404
