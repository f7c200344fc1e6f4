"""A ClickHouse HTTP endpoint in its own process, answered by the real ClickHouse engine
(chdb), for tests that must not open a chdb folder in the pytest process (chdb allows one
data folder per process, and tests/test_engines_matrix.py holds one for the whole session).

    python tests/chdb_http_server.py ROOT   # loads the engine fixture rows, prints the port

The body of a POST is the query; the answer is its ``ArrowStream`` bytes (status 200) or
the engine's error text (status 500), like ClickHouse's own HTTP interface.
"""

from __future__ import annotations

import importlib.util
import sys
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path


def main(root: str) -> None:
    spec = importlib.util.spec_from_file_location("fx", Path(__file__).with_name("engine_fixtures.py"))
    fx = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(fx)
    cfg = fx.load_chdb(Path(root), fx.arrow_table(fx.make_rows()))
    from chdb import session as chs

    sess = chs.Session(cfg["path"])
    sess.query("SET readonly = 2")
    lock = threading.Lock()

    class Handler(BaseHTTPRequestHandler):
        def log_message(self, *args):  # quiet
            pass

        def do_POST(self):
            sql = self.rfile.read(int(self.headers.get("Content-Length", 0))).decode("utf-8")
            with lock:
                try:
                    body, status = sess.query(sql, "ArrowStream").bytes(), 200
                except Exception as e:  # noqa: BLE001 - the engine's error text
                    body, status = str(e).encode("utf-8"), 500
            self.send_response(status)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    print(f"{server.server_address[1]} {cfg['table']}", flush=True)
    server.serve_forever()


if __name__ == "__main__":
    main(sys.argv[1])
