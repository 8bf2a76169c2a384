"""Every error the service returns, as application/problem+json (RFC 9457).

A problem body has ``type``, ``title``, ``status``, ``detail`` and ``instance`` (the
request path); input errors add ``errors``: one entry per thing wrong, with the ``field``
path (``gain.target``, ``parts.r_top``, ``query.units``), the ``value`` given and what
would be ``expected``. A catch-all handler turns anything unexpected into a logged 500
problem, so no response ever carries an HTML error page or a traceback.
"""

from __future__ import annotations

import json
import logging
import math
from typing import Any, Iterable

from flask import Flask, Response, request
from werkzeug.exceptions import HTTPException

from optimizer.errors import MISSING, InputError, Problem, StorageError

PROBLEM_JSON = "application/problem+json"
TYPE_PREFIX = "urn:stagefit:problem:"
log = logging.getLogger("api")


class ApiProblem(Exception):
    """Raised by a route to answer with a problem document."""

    def __init__(
        self,
        status: int,
        title: str,
        detail: str,
        *,
        kind: str | None = None,
        errors: Iterable[Problem] = (),
        headers: dict[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.status, self.title, self.detail = status, title, detail
        self.kind = kind
        self.errors = list(errors)
        self.headers = headers or {}

    @classmethod
    def from_input(
        cls, error: InputError, status: int = 422, *, kind: str = "invalid-input", prefix: str = ""
    ) -> "ApiProblem":
        """An InputError as a problem; ``prefix`` is put before every field path."""
        problems = [Problem(_join(prefix, p.where), p.value, p.expected) for p in error.problems]
        return cls(status, error.title, _detail(error.title, problems), kind=kind, errors=problems)


def _join(prefix: str, where: str) -> str:
    if not prefix:
        return where
    return f"{prefix}{where}" if where.startswith("[") else f"{prefix}.{where}" if where else prefix


def _detail(title: str, problems: list[Problem]) -> str:
    if len(problems) == 1:
        return f"{title}: {problems[0]}"
    return f"{title}: {len(problems)} problems; see errors"


def _plain(value: Any) -> Any:
    """A JSON-safe rendition of a value the user sent (or a repr of it; null where none was sent)."""
    if value is MISSING:
        return None
    if value is None or isinstance(value, bool):
        return value
    if isinstance(value, int):
        return value if abs(value) < 2**63 else _shorten(str(value))
    if isinstance(value, str):
        return _shorten(value)
    if isinstance(value, float):
        return value if math.isfinite(value) else str(value)
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value][:50]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in list(value.items())[:50]}
    return _shorten(repr(value))


def _shorten(text: str, most: int = 200) -> str:
    return text if len(text) <= most else f"{text[:most]}... ({len(text)} characters)"


def problem_body(
    status: int, title: str, detail: str, *, kind: str | None = None, errors: Iterable[Problem] = ()
) -> str:
    """The problem document as JSON text (``instance`` is the request path, in a request)."""
    body: dict[str, Any] = {
        "type": TYPE_PREFIX + kind if kind else "about:blank",
        "title": title,
        "status": status,
        "detail": detail,
    }
    if _in_request():
        body["instance"] = request.path
    errors = list(errors)
    if errors:
        body["errors"] = [{"field": p.where, "value": _plain(p.value), "expected": p.expected} for p in errors]
    # ensure_ascii: a lone surrogate the user sent is echoed as an escape, never a UnicodeEncodeError
    return json.dumps(body)


def problem_response(
    status: int,
    title: str,
    detail: str,
    *,
    kind: str | None = None,
    errors: Iterable[Problem] = (),
    headers: dict[str, str] | None = None,
) -> Response:
    """Build the problem+json response (``kind`` None means ``about:blank``)."""
    response = Response(
        problem_body(status, title, detail, kind=kind, errors=errors), status=status, mimetype=PROBLEM_JSON
    )
    for key, value in (headers or {}).items():
        response.headers[key] = value
    return response


_HTTP_DETAIL = {
    400: "the request could not be read; check its syntax",
    401: "this route needs an Authorization: Bearer <token> header with the service's API token",
    404: "no such resource; GET /v1/openapi.json lists every route",
    405: "this method is not allowed here; the Allow header lists the ones that are",
    406: "the Accept header allows no type this route can produce",
    413: "the request body is larger than the service accepts",
    415: "send the body as application/json",
}


def http_detail(status: int) -> str:
    """The standard advice for an HTTP error status."""
    return _HTTP_DETAIL.get(status, "")


def _http_problem(error: HTTPException) -> Response:
    status = error.code or 500
    headers = {}
    if status == 405:
        allowed = getattr(error, "valid_methods", None) or []
        if allowed:
            headers["Allow"] = ", ".join(allowed)
    if status == 413:
        limit = request.max_content_length if _in_request() else None
        detail = (
            f"the request body is larger than the {limit}-byte limit (STAGEFIT_MAX_BODY); send a smaller body"
            if limit
            else _HTTP_DETAIL[413]
        )
    else:
        detail = _HTTP_DETAIL.get(status) or (error.description or error.name)
    return problem_response(status, error.name, detail, headers=headers)


def _in_request() -> bool:
    try:
        request.path  # noqa: B018 - probe for a request context
    except RuntimeError:
        return False
    return True


def register(app: Flask) -> None:
    """Install the handlers: ApiProblem, InputError (422), HTTP errors, and the catch-all."""

    @app.errorhandler(ApiProblem)
    def _api_problem(error: ApiProblem) -> Response:
        return problem_response(
            error.status, error.title, error.detail, kind=error.kind, errors=error.errors, headers=error.headers
        )

    @app.errorhandler(InputError)
    def _input_error(error: InputError) -> Response:
        problem = ApiProblem.from_input(error)
        return _api_problem(problem)

    @app.errorhandler(StorageError)
    def _storage_error(error: StorageError) -> Response:
        log.error("storage error on %s %s: %s", request.method, request.path, error)
        return problem_response(
            503,
            "Service Unavailable",
            f"the search storage is not available: {error}",
            kind="storage-unavailable",
            headers={"Retry-After": "30"},
        )

    @app.errorhandler(HTTPException)
    def _http_error(error: HTTPException) -> Response:
        return _http_problem(error)

    @app.errorhandler(Exception)
    def _unexpected(error: Exception) -> Response:
        log.exception("unexpected error on %s %s", request.method, request.path)
        return problem_response(
            500,
            "Internal Server Error",
            "an unexpected error occurred; it has been logged. This is a bug "
            "in stagefit: please report it with the request you sent",
            kind="internal-error",
        )
