"""Bad input over real HTTP: every case is a 4xx with a JSON message naming the field, never a 500.

Status codes as RFC 9110 defines them (section 15.5): 400 for a body that is not JSON at all, 413 for
content too large, 415 for a media type the route does not take, 422 for well-formed but invalid
content (FastAPI's convention for validation errors).
"""

from __future__ import annotations

import socket

import pytest

GOOD = {"item_id": "sku-000001"}


def post(client, session: str, **kwargs):
    return client.post(f"/v1/sessions/{session}/clicks", **kwargs)


def check_error(r, status: int, field: str) -> dict:
    assert r.status_code == status, (r.status_code, r.text)
    body = r.json()
    assert body["field"] == field, body
    assert field in body["message"] or body["field"] in ("body", "content-type"), body
    assert "Traceback" not in r.text and "service/" not in r.text
    return body


@pytest.mark.parametrize(
    "body, field",
    [
        ({}, "item_id"),  # missing item_id
        ({"item_id": None}, "item_id"),
        ({"item_id": 1.5}, "item_id"),  # wrong JSON types
        ({"item_id": True}, "item_id"),
        ({"item_id": ["sku-000001"]}, "item_id"),
        ({"item_id": ""}, "item_id"),
        ({"item_id": "x" * 257}, "item_id"),
        ({"item_id": 2**70}, "item_id"),
        ({**GOOD, "count": 0}, "count"),  # count outside 1..100
        ({**GOOD, "count": 101}, "count"),
        ({**GOOD, "count": "10"}, "count"),
        ({**GOOD, "count": 3.5}, "count"),  # an integer with a fraction is no integer
        ({**GOOD, "count": True}, "count"),
        ({**GOOD, "budget_ms": 0}, "budget_ms"),  # budget outside 1..10000
        ({**GOOD, "budget_ms": 10001}, "budget_ms"),
        ({**GOOD, "exclude_seen": "yes"}, "exclude_seen"),
        ({**GOOD, "event_id": {"a": 1}}, "event_id"),
        ({**GOOD, "colour": "red"}, "colour"),  # unknown field
    ],
)
def test_bad_click_bodies(server, sid, body, field):
    with server.client() as c:
        check_error(post(c, sid(), json=body), 422, field)


@pytest.mark.parametrize("session", ["x" * 129, "has space", "semi;colon", "quote%22", "%C3%A9t%C3%A9"])
def test_bad_session_ids(server, session):
    with server.client() as c:
        check_error(post(c, session, json=GOOD), 422, "session_id")
        check_error(c.get(f"/v1/sessions/{session}/recommendations"), 422, "session_id")
        check_error(c.delete(f"/v1/sessions/{session}"), 422, "session_id")


def test_session_id_with_a_slash_matches_no_route(server):
    with server.client() as c:
        r = post(c, "sl%2Fash", json=GOOD)  # decoded to "sl/ash": two path segments, so no route at all
    assert r.status_code == 404 and r.json()["error"] == "not_found"


def test_longest_and_odd_but_valid_session_ids(server):
    with server.client() as c:
        for session in ["a" * 128, "A-b_c.d:9"]:
            assert post(c, session, json=GOOD).status_code == 200


@pytest.mark.parametrize("params, field", [({"count": 0}, "count"), ({"count": 101}, "count"), ({"count": "ten"}, "count"),
                                           ({"exclude_seen": "perhaps"}, "exclude_seen"), ({"budget_ms": 0}, "budget_ms")])
def test_bad_query_parameters(server, sid, params, field):
    with server.client() as c:
        check_error(c.get(f"/v1/sessions/{sid()}/recommendations", params=params), 422, field)


def test_malformed_json(server, sid):
    with server.client() as c:
        for raw in [b"{", b'{"item_id": "a",}', b"\xff\xfe", b"nul"]:
            check_error(post(c, sid(), content=raw, headers={"content-type": "application/json"}), 400, "body")
        check_error(post(c, sid(), content=b"[1, 2]", headers={"content-type": "application/json"}), 422, "body")
        check_error(post(c, sid(), content=b"", headers={"content-type": "application/json"}), 422, "body")
        check_error(post(c, sid(), content=b"item_id=3", headers={"content-type": "application/x-www-form-urlencoded"}), 415, "content-type")


def test_bodies_json_cannot_read_name_the_body(server, sid):
    # json.loads raises RecursionError, UnicodeDecodeError or ValueError (Python's 4300-digit limit on
    # int conversion) for these: each is a 400 naming the body, not an anonymous error.
    deep = b'{"item_id": ' + b"[" * 5000 + b"]" * 5000 + b"}"
    for raw in [deep, b"[" * 5000 + b"]" * 5000, b'{"item_id": "\xff\xfe"}', b'{"item_id": ' + b"9" * 5000 + b"}"]:
        with server.client() as c:
            r = post(c, sid(), content=raw, headers={"content-type": "application/json"})
        body = check_error(r, 400, "body")
        assert body["error"] == "malformed_json"


def test_integral_floats_are_integers_as_json_schema_says(server, sid):
    # JSON Schema 2020-12 (validation, section 6.1.1): "integer" matches any number with a zero
    # fractional part, so 244.0 is a valid budget_ms and 3.0 a valid count.
    with server.client() as c:
        r = post(c, sid(), json={**GOOD, "budget_ms": 244.0, "count": 3.0})
    assert r.status_code == 200, r.text
    assert len(r.json()["items"]) == 3


def test_the_openapi_document_says_what_metrics_and_the_switch_answer(server):
    with server.client() as c:
        doc = c.get("/openapi.json").json()
        assert c.get("/metrics").headers["content-type"].startswith("text/plain")
    assert "application/json" not in doc["paths"]["/metrics"]["get"]["responses"]["200"]["content"]
    assert "400" in doc["paths"]["/v1/serving"]["put"]["responses"]  # a switch without a body


def test_body_over_16_kb_is_refused_before_parsing(server, sid):
    with server.client() as c:
        # Announced length: refused on the header alone. The body is not even valid JSON, so a 413
        # (not 400) shows it was never parsed.
        check_error(post(c, sid(), content=b"{" * (16 * 1024 + 1), headers={"content-type": "application/json"}), 413, "body")
        # Exactly 16 KB (a valid click padded with JSON whitespace) is still taken.
        padded = b'{"item_id": "sku-000001"}'.ljust(16 * 1024)
        assert post(c, sid(), content=padded, headers={"content-type": "application/json"}).status_code == 200
        # Chunked, no length announced: counted while it arrives.
        chunks = (b"{" * 4096 for _ in range(5))
        check_error(post(c, sid(), content=chunks, headers={"content-type": "application/json"}), 413, "body")


def test_unknown_session_is_a_new_visit_not_an_error(server, sid):
    with server.client() as c:
        r = c.get(f"/v1/sessions/{sid()}/recommendations")
        assert r.status_code == 200 and r.json()["sequence"] == 0
        assert c.delete(f"/v1/sessions/{sid()}").status_code == 204


def test_unknown_routes_and_methods(server, sid):
    with server.client() as c:
        r = c.get("/v2/nothing")
        assert r.status_code == 404 and r.json()["error"] == "not_found"
        r = c.put(f"/v1/sessions/{sid()}/clicks", json=GOOD)
        assert r.status_code == 405 and r.json()["error"] == "method_not_allowed"


def test_raw_garbage_never_gets_a_500(server):
    # Bytes no client library would send, straight onto the socket.
    host, port = server.url.removeprefix("http://").split(":")
    requests = [
        b"POST /v1/sessions/a/clicks HTTP/1.1\r\nHost: x\r\nContent-Length: abc\r\n\r\n{}",
        b"POST /v1/sessions/a/clicks HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 2\r\n\r\n\x00\x01",
        b"GET /v1/sessions/%ZZ/recommendations HTTP/1.1\r\nHost: x\r\n\r\n",
        b"GET /v1/sessions/a/recommendations?count=%00 HTTP/1.1\r\nHost: x\r\n\r\n",
    ]
    for raw in requests:
        with socket.create_connection((host, int(port)), timeout=5) as s:
            s.sendall(raw)
            reply = s.recv(65536)
        status = int(reply.split(b" ", 2)[1])
        assert 400 <= status < 500, reply[:200]
        assert b"Traceback" not in reply
