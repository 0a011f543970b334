"""Serve a store's health as an OpenMetrics endpoint for a metrics scraper.

The scenario (invented): the Yarrowby tide-gauge network keeps a store of
surge-event fingerprints (2048-bit codes, 40 set bits) and wants its
monitoring to scrape the store's capacity headroom like any other metric, so
it can page someone well before chance matches become too common.

``GET /metrics`` answers ``store.health().to_openmetrics()`` with the
OpenMetrics content type; every other path is 404. ``health()`` reads
counters the store keeps as it changes, so a scrape costs about a
millisecond. The server uses only the standard library's ``http.server``
(one thread per request; the store serves many threads at once) and listens
on 127.0.0.1 only.

Run::

    python examples/serve_health.py                         # a sample store, http://127.0.0.1:9464/metrics
    python examples/serve_health.py tides.sidx --port 9464  # a saved store, opened memory-mapped
    python examples/serve_health.py --port 0 --once         # free port, scrape itself once, print, exit
"""

from __future__ import annotations

import argparse
import threading
import urllib.request
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from sparseindex import Codes, Store

CONTENT_TYPE = "application/openmetrics-text; version=1.0.0; charset=utf-8"


def sample_store(events: int) -> Store:
    """A store planned for 200,000 surge events, holding ``events`` random ones."""
    store = Store.for_target(2048, 40, false_hit=1e-6, capacity=200_000, noise=0.25, seed=17)
    store.add(Codes.random(events, 2048, 40, seed=17))
    return store


def make_server(store: Store, port: int) -> ThreadingHTTPServer:
    """An HTTP server on 127.0.0.1:``port`` (0: any free port) exposing ``store.health()``."""

    class Metrics(BaseHTTPRequestHandler):
        def do_GET(self):
            if self.path.split("?")[0] != "/metrics":
                self.send_error(404, "only /metrics is served here")
                return
            body = store.health().to_openmetrics().encode("utf-8")
            self.send_response(200)
            self.send_header("Content-Type", CONTENT_TYPE)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

    return ThreadingHTTPServer(("127.0.0.1", port), Metrics)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description="Serve a store's health() as OpenMetrics at /metrics.")
    parser.add_argument("store", nargs="?", help="a store saved by Store.save (default: a sample store)")
    parser.add_argument("--port", type=int, default=9464, help="port on 127.0.0.1 (0: any free port)")
    parser.add_argument("--events", type=int, default=150_000, help="codes in the sample store (default 150,000)")
    parser.add_argument("--once", action="store_true", help="scrape the endpoint once, print it and exit")
    args = parser.parse_args(argv)

    if args.store:
        store = Store.load(args.store, mmap=True)
        what = f"{args.store} (memory-mapped)"
    else:
        store = sample_store(args.events)
        what = f"a sample store of {len(store):,} surge events"
    server = make_server(store, args.port)
    url = f"http://127.0.0.1:{server.server_address[1]}/metrics"
    print(f"serving the health of {what} at {url}", flush=True)
    if not args.once:
        try:
            server.serve_forever()
        except KeyboardInterrupt:
            pass
        finally:
            server.server_close()
        return
    worker = threading.Thread(target=server.serve_forever, daemon=True)
    worker.start()
    try:
        with urllib.request.urlopen(url, timeout=30) as reply:
            print(f"GET {url} -> {reply.status}, Content-Type: {reply.headers['Content-Type']}")
            print(reply.read().decode("utf-8"), end="")
    finally:
        server.shutdown()
        server.server_close()


if __name__ == "__main__":
    main()
