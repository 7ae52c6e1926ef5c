"""Every error answer is JSON `{error, message, field, status}`; no request gets a traceback.

Validation errors name the field (and echo a short form of the bad value); malformed JSON is 400,
other invalid input 422, as FastAPI and RFC 9110 (section 15.5) use them.
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.api.middleware import error_body
from service.api.schemas import SESSION_ID_CHARS, SESSION_ID_MAX

_SHOWN = 40  # characters of a bad value quoted back
_FASTAPI_PARSE_FAILURE = "There was an error parsing the body"  # FastAPI's detail when json.loads raises a non-JSON error


class ApiError(Exception):
    def __init__(self, status: int, error: str, message: str, field: str | None = None, headers: dict[str, str] | None = None) -> None:
        super().__init__(message)
        self.status, self.error, self.message, self.field, self.headers = status, error, message, field, headers


def json_error(status: int, error: str, message: str, field: str | None = None, headers: dict[str, str] | None = None) -> Response:
    return Response(error_body(status, error, message, field), status_code=status, media_type="application/json", headers=headers)


def describe_validation(errors: list[dict[str, Any]]) -> tuple[int, str, str, str]:
    """(status, error code, message, field) for pydantic errors; the first field that failed is named."""
    first = errors[0]
    loc = [str(p) for p in first.get("loc", ())]
    if first.get("type") == "json_invalid":
        return 400, "malformed_json", f"request body is not valid JSON ({first.get('ctx', {}).get('error', 'parse error')})", "body"
    field = loc[1] if len(loc) > 1 else (loc[0] if loc else "request")
    if field == "body" and first.get("type") == "missing":
        return 422, "invalid_request", "request body is missing: send a JSON object", "body"
    if field == "body" and isinstance(first.get("input"), bytes):
        # FastAPI parses JSON only when Content-Type says JSON (or is absent); anything else arrives as bytes.
        return 415, "unsupported_media_type", "send the body as a JSON object with Content-Type: application/json", "content-type"
    # A union field (item id: text or integer) fails once per member; say all that was expected.
    same = [e for e in errors if len(e.get("loc", ())) > 1 and str(e["loc"][1]) == field] or [first]
    messages = list(dict.fromkeys(str(e.get("msg", "invalid")).removeprefix("Value error, ") for e in same))
    lead = "Input should be "
    if len(messages) > 1 and all(m.startswith(lead) for m in messages):
        messages = [lead + " or ".join(m.removeprefix(lead) for m in messages)]
    if first.get("type") == "string_pattern_mismatch" and field == "session_id":
        messages = [f"use 1-{SESSION_ID_MAX} characters from: {SESSION_ID_CHARS}"]
    message = f"{field}: {' or '.join(messages)}"
    if first.get("type") != "missing" and "input" in first:
        shown = repr(first["input"])
        message += f" (got {shown[:_SHOWN]}{'...' if len(shown) > _SHOWN else ''})"
    return 422, "invalid_request", message, field


def install_handlers(app: FastAPI) -> None:
    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> Response:
        status, error, message, field = describe_validation(list(exc.errors()))
        return json_error(status, error, message, field)

    @app.exception_handler(ApiError)
    async def _api(request: Request, exc: ApiError) -> Response:
        return json_error(exc.status, exc.error, exc.message, exc.field, exc.headers)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> Response:
        if exc.status_code == 400 and exc.detail == _FASTAPI_PARSE_FAILURE:
            # json.loads raised something other than a syntax error: invalid UTF-8, nesting deeper
            # than the parser's recursion limit, or an integer longer than Python converts (4300 digits).
            message = "request body could not be read as JSON (invalid UTF-8, nesting too deep, or a number too long)"
            return json_error(400, "malformed_json", message, "body")
        codes = {404: "not_found", 405: "method_not_allowed"}
        message = {404: "no such route", 405: "method not allowed on this route"}.get(exc.status_code, str(exc.detail))
        return json_error(exc.status_code, codes.get(exc.status_code, "http_error"), message, None, getattr(exc, "headers", None))

    @app.exception_handler(Exception)
    async def _last_resort(request: Request, exc: Exception) -> Response:
        # Reached only if an error escapes the edge middleware's own last resort.
        return json_error(500, "internal_error", "the service failed to answer this request")
