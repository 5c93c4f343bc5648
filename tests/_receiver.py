"""A webhook receiver for the tests: a tiny HTTP server on loopback that records what it is sent."""

from __future__ import annotations

import http.server
import threading
import time


class Receiver:
    """A tiny HTTP server on loopback that records requests and answers from a script."""

    def __init__(self, answers: list[int], *, delay_s: float = 0.0) -> None:
        self.answers = list(answers)
        self.delay_s = delay_s
        self.requests: list[dict] = []
        self.arrived = threading.Condition()
        receiver = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (the stdlib's name)
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                time.sleep(receiver.delay_s)
                status = receiver.answers.pop(0) if len(receiver.answers) > 1 else receiver.answers[0]
                self.send_response(status)
                if 300 <= status < 400:
                    self.send_header("Location", "/elsewhere")
                self.send_header("Content-Length", "0")
                self.end_headers()
                with receiver.arrived:
                    receiver.requests.append(
                        {"path": self.path, "headers": dict(self.headers), "body": body, "at": time.monotonic()}
                    )
                    receiver.arrived.notify_all()

            def log_message(self, *args: object) -> None:
                pass

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.url = f"http://127.0.0.1:{self.port}/hook?lab=1"
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()

    def wait_for(self, count: int, timeout_s: float) -> list[dict]:
        with self.arrived:
            self.arrived.wait_for(lambda: len(self.requests) >= count, timeout_s)
        return list(self.requests)
