"""`stagefit serve`: the app under waitress, a production WSGI server (pure Python,
cross-platform, threads rather than forked workers, so the background search pool lives
in the one server process with the routes)."""

from __future__ import annotations

import logging
import signal
import socket
import sys
from typing import Any, Mapping, TextIO

from optimizer.errors import InputError


def _problem_channel() -> type:
    """waitress's connection class whose error responses (a body past its own limit, a
    malformed request line, headers too large) are problem+json like the app's."""
    from waitress.channel import HTTPChannel
    from waitress.task import ErrorTask

    from api.problems import PROBLEM_JSON, problem_body

    class ProblemErrorTask(ErrorTask):
        def execute(self) -> None:
            error = self.request.error
            detail = str(error.body).strip() or error.reason
            if error.code == 413:
                detail = "the request body is larger than the service accepts (STAGEFIT_MAX_BODY); send a smaller body"
            body = problem_body(error.code, error.reason, detail).encode("utf-8")
            self.status = f"{error.code} {error.reason}"
            self.response_headers.extend([("Content-Type", PROBLEM_JSON), ("Content-Length", str(len(body)))])
            self.set_close_on_finish()
            self.content_length = len(body)
            self.write(body)

    class ProblemChannel(HTTPChannel):
        error_task_class = ProblemErrorTask

    return ProblemChannel


def _health_first(threads: int) -> Any:
    """waitress's task dispatcher with /healthz put at the head of its queue: under load a
    health check waits for the next free request thread, not behind every queued request
    (a load balancer that sees health checks time out takes a busy server out of service)."""
    from waitress.task import ThreadedTaskDispatcher

    class HealthFirst(ThreadedTaskDispatcher):
        def add_task(self, task: Any) -> None:
            requests = getattr(task, "requests", None)  # the channel; its first request is the one to serve
            if requests and getattr(requests[0], "path", None) == "/healthz":
                with self.lock:
                    self.queue.appendleft(task)
                    self.queue_cv.notify()
                return
            super().add_task(task)

    dispatcher = HealthFirst()
    dispatcher.set_thread_count(threads)
    return dispatcher


def serve(
    host: str = "127.0.0.1",
    port: int = 8750,
    *,
    config: Mapping[str, Any] | None = None,
    out: TextIO = sys.stderr,
    open_path: str | None = None,
) -> None:
    """Serve until SIGINT or SIGTERM; the search pool finishes its batch in flight first.
    Port 0 picks a free port; the address actually bound is printed to ``out``. Request
    threads: STAGEFIT_THREADS (default 8). ``open_path`` (e.g. "/" or "/searches/ID"): open
    that page in the user's web browser once the server listens."""
    from waitress import create_server

    from api import create_app

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    app = create_app(config)
    service = app.extensions["stagefit"]
    threads = service.settings.threads
    try:
        server = create_server(
            app,
            host=host,
            port=port,
            threads=threads,
            ident="stagefit",
            _dispatcher=_health_first(threads),  # waitress takes its dispatcher here (a test hook in its code)
            # the app answers 413 (problem+json) past STAGEFIT_MAX_BODY; waitress
            # buffers a body before the app sees it, so it stops far larger ones
            max_request_body_size=max(64 * service.settings.max_body, 16 * 2**20),
            clear_untrusted_proxy_headers=True,
        )
    except (ValueError, socket.gaierror):  # a host that is no address and resolves to none
        service.jobs.stop()
        raise InputError.single(
            "--host",
            host,
            "an address of this machine to listen on, e.g. 127.0.0.1, 0.0.0.0 or a host name it resolves",
        ) from None
    server.channel_class = _problem_channel()  # waitress's own refusals as problem+json too

    def _stop(signum: int, frame: Any) -> None:
        raise KeyboardInterrupt  # waitress's run() catches it and closes its task threads

    previous = signal.signal(signal.SIGTERM, _stop)
    mode = "queue only" if service.settings.queue_only else f"{service.settings.workers} search worker(s)"
    print(
        f"stagefit serving on http://{server.effective_host}:{server.effective_port}/ "
        f"(storage {service.settings.storage}; {mode})",
        file=out,
        flush=True,
    )
    if open_path is not None:
        import webbrowser

        url = f"http://{server.effective_host}:{server.effective_port}{open_path}"
        if not webbrowser.open(url):
            print(f"no web browser found here: open {url} yourself", file=out, flush=True)
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        print("stagefit: stopping (the search pool finishes its batch in flight)", file=out, flush=True)
        signal.signal(signal.SIGTERM, previous)
        service.jobs.stop()
        server.close()
