"""`stagefit serve`: the app under waitress, a production WSGI server (pure Python,
cross-platform, threads rather than forked workers, so the background search pool lives
in the one server process with the routes)."""
from __future__ import annotations

import logging
import signal
import sys
from typing import Any, Mapping, TextIO


def serve(host: str = "127.0.0.1", port: int = 8750, *, threads: int = 8,
          config: Mapping[str, Any] | None = None, out: TextIO = sys.stderr) -> None:
    """Serve until SIGINT or SIGTERM; the search pool finishes its batch in flight first.
    Port 0 picks a free port; the address actually bound is printed to ``out``."""
    from waitress import create_server

    from api import create_app

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    app = create_app(config)
    service = app.extensions["stagefit"]
    server = create_server(app, host=host, port=port, threads=threads, ident="stagefit",
                           # the app answers 413 (problem+json) past STAGEFIT_MAX_BODY; waitress
                           # buffers a body before the app sees it, so it stops far larger ones
                           max_request_body_size=max(64 * service.settings.max_body, 16 * 2**20),
                           clear_untrusted_proxy_headers=True)

    def _stop(signum: int, frame: Any) -> None:
        raise KeyboardInterrupt  # waitress's run() catches it and closes its task threads

    previous = signal.signal(signal.SIGTERM, _stop)
    mode = "queue only" if service.settings.queue_only else f"{service.settings.workers} search worker(s)"
    print(f"stagefit serving on http://{server.effective_host}:{server.effective_port}/ "
          f"(storage {service.settings.storage}; {mode})", file=out, flush=True)
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        print("stagefit: stopping (the search pool finishes its batch in flight)", file=out, flush=True)
        signal.signal(signal.SIGTERM, previous)
        service.jobs.stop()
        server.close()
