"""stagefit's REST service (Flask); a thin door onto the ``optimizer`` package.

``create_app(config=None)`` builds the app. Settings come from the environment, and any
key given in ``config`` (same names) wins:

=========================  ==========================================================
``STAGEFIT_STORAGE``       Optuna storage URL: a journal file path, ``journal:///abs``,
                           ``sqlite:///...`` or ``postgresql://...``
                           (default ``<STAGEFIT_DATA_DIR>/stagefit.journal``)
``STAGEFIT_DATA_DIR``      directory for the default journal (default ``./runs``)
``STAGEFIT_API_TOKEN``     when set, every route but ``/healthz`` and the browser pages'
                           data-free shells and assets needs ``Authorization: Bearer <token>``
``STAGEFIT_MAX_TRIALS``    largest trial budget a posted spec may ask for (default 20000)
``STAGEFIT_MAX_BODY``      largest request body in bytes (default 262144)
``STAGEFIT_MAX_WAIT``      longest ``?wait=`` in seconds (default 60; longer is clamped)
``STAGEFIT_MAX_WAITERS``   requests that may wait (``?wait=``) at once (default half of
                           ``STAGEFIT_THREADS``); past it a POST answers 202 at once
``STAGEFIT_MAX_QUEUE``     searches queued or running at once (default 64); past it a
                           POST answers 429 with Retry-After
``STAGEFIT_THREADS``       request threads of `stagefit serve` (default 8)
``STAGEFIT_WORKERS``       searches run at once by the background pool (default 1)
``STAGEFIT_QUEUE_ONLY``    ``1``: only queue searches; external workers run the trials
``STAGEFIT_STALE_AFTER``   seconds after which a trial left running by a stopped process
                           is failed and asked again (default 120)
=========================  ==========================================================

Every request and response body is JSON (errors: application/problem+json); the search
state lives only in the Optuna storage, so a restarted server resumes what was running.
"""

from __future__ import annotations

import dataclasses
import hmac
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from flask import Flask, Response, jsonify, request
from flask.json.provider import DefaultJSONProvider
from werkzeug.routing import IntegerConverter

from optimizer.errors import InputError

__all__ = ["create_app", "Settings"]


@dataclass(frozen=True)
class Settings:
    """The service's settings, read once by :func:`create_app`."""

    storage: str
    data_dir: str = "runs"
    api_token: str | None = None
    max_trials: int = 20000
    max_body: int = 256 * 1024
    max_wait: float = 60.0
    max_waiters: int = 4
    max_queue: int = 64
    threads: int = 8
    workers: int = 1
    queue_only: bool = False
    stale_after: float = 120.0

    @classmethod
    def load(cls, config: Mapping[str, Any] | None = None) -> "Settings":
        """Settings from the environment overridden by ``config`` (InputError if invalid)."""
        source: dict[str, Any] = {k: v for k, v in os.environ.items() if k.startswith("STAGEFIT_")}
        source.update(config or {})
        problems = []

        def number(key: str, default: float, kind: type, low: float, high: float) -> Any:
            raw = source.get(key)
            if raw is None or raw == "":
                return default
            try:
                value = kind(raw)
                if isinstance(raw, bool) or not (low <= value <= high) or not math.isfinite(value):
                    raise ValueError
            except (TypeError, ValueError):
                kind_name = "a whole number" if kind is int else "a number"
                problems.append(InputError.single(key, raw, f"{kind_name} from {low:g} to {high:g}").problems[0])
                return default
            return value

        data_dir = str(source.get("STAGEFIT_DATA_DIR") or "runs")
        storage = str(source.get("STAGEFIT_STORAGE") or Path(data_dir) / "stagefit.journal")
        queue_only = str(source.get("STAGEFIT_QUEUE_ONLY", "")).strip().lower()
        if queue_only not in ("", "0", "1", "true", "false", "yes", "no", "on", "off"):
            problems.append(InputError.single("STAGEFIT_QUEUE_ONLY", queue_only, "1 or 0").problems[0])
        settings = cls(
            storage=storage,
            data_dir=data_dir,
            api_token=str(source["STAGEFIT_API_TOKEN"]) if source.get("STAGEFIT_API_TOKEN") else None,
            max_trials=number("STAGEFIT_MAX_TRIALS", cls.max_trials, int, 1, 10_000_000),
            max_body=number("STAGEFIT_MAX_BODY", cls.max_body, int, 1024, 64 * 1024 * 1024),
            max_wait=number("STAGEFIT_MAX_WAIT", cls.max_wait, float, 0, 3600),
            max_waiters=number("STAGEFIT_MAX_WAITERS", 0, int, 1, 1024),
            max_queue=number("STAGEFIT_MAX_QUEUE", cls.max_queue, int, 1, 100_000),
            threads=number("STAGEFIT_THREADS", cls.threads, int, 2, 1024),
            workers=number("STAGEFIT_WORKERS", cls.workers, int, 1, 64),
            queue_only=queue_only in ("1", "true", "yes", "on"),
            stale_after=number("STAGEFIT_STALE_AFTER", cls.stale_after, float, 0, 86400),
        )
        if not settings.max_waiters:  # default: half the request threads, the rest stay free
            settings = dataclasses.replace(settings, max_waiters=max(1, settings.threads // 2))
        elif settings.max_waiters >= settings.threads:
            problems.append(
                InputError.single(
                    "STAGEFIT_MAX_WAITERS",
                    settings.max_waiters,
                    f"fewer than STAGEFIT_THREADS ({settings.threads}), so requests "
                    "that do not wait always find a thread",
                ).problems[0]
            )
        if problems:
            raise InputError(problems, title="invalid service settings")
        return settings


class _JSONProvider(DefaultJSONProvider):
    """Strict JSON out: NaN and infinities (not JSON) become null; numpy scalars plain."""

    sort_keys = False
    ensure_ascii = False

    def dumps(self, obj: Any, **kwargs: Any) -> str:
        kwargs.setdefault("allow_nan", False)
        return super().dumps(_finite(obj), **kwargs)

    @staticmethod
    def default(o: Any) -> Any:
        if hasattr(o, "item") and callable(o.item):  # numpy scalar
            return _finite(o.item())
        if hasattr(o, "tolist"):
            return _finite(o.tolist())
        return DefaultJSONProvider.default(o)


def _finite(obj: Any) -> Any:
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


class _AsciiInteger(IntegerConverter):
    """Werkzeug's integer path converter, matching ASCII digits only (its own ``\\d`` also takes
    '１' and '٣', which int() reads as 1 and 3)."""

    regex = r"[0-9]+"
    signed_regex = r"-?[0-9]+"


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """The stagefit REST app. ``config`` keys are the environment names above.

    The background pool (unless queue-only) is started here and resumes every stored
    search that is queued or running; it is ``app.extensions["stagefit"].jobs``.
    """
    from api import jobs, pages, problems, routes
    from optimizer.storage import open_storage

    settings = Settings.load(config)
    app = Flask("api", static_folder=None)  # the pages blueprint serves its own assets
    app.url_map.merge_slashes = False  # /v1/searches//candidates is a 404, not a redirect
    app.url_map.converters["int"] = _AsciiInteger  # a rank in a path is ASCII digits, as every number we read
    app.json = _JSONProvider(app)
    app.config["MAX_CONTENT_LENGTH"] = settings.max_body
    problems.register(app)

    storage = open_storage(settings.storage)
    pool = jobs.JobPool(
        storage,
        workers=settings.workers,
        run=not settings.queue_only,
        stale_after=settings.stale_after,
        max_queue=settings.max_queue,
        max_waiters=settings.max_waiters,
    )
    app.extensions["stagefit"] = routes.Service(settings=settings, storage=storage, jobs=pool)

    @app.before_request
    def _authorise() -> None:
        token = settings.api_token
        if token is None or request.path == "/healthz" or request.endpoint in pages.PUBLIC_ENDPOINTS:
            return None  # the pages' shells and assets carry no data; their data routes need the token
        scheme, _, given = request.headers.get("Authorization", "").partition(" ")
        if scheme.lower() == "bearer" and hmac.compare_digest(given.strip().encode(), token.encode()):
            return None
        raise problems.ApiProblem(
            401,
            "Unauthorized",
            problems.http_detail(401),
            kind="unauthorized",
            headers={"WWW-Authenticate": 'Bearer realm="stagefit"'},
        )

    @app.get("/healthz")
    def healthz() -> Response:
        return jsonify(
            {
                "status": "ok",
                "queue_only": settings.queue_only,
                "workers": 0 if settings.queue_only else settings.workers,
            }
        )

    app.register_blueprint(routes.blueprint, url_prefix="/v1")
    app.register_blueprint(pages.blueprint)  # the browser pages (api/pages.py)
    pool.start()
    return app
