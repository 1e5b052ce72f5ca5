"""A webhook receiver as a user would write one, verifying by the Standard Webhooks
specification (https://www.standardwebhooks.com/, "Verifying webhooks"), written out
here from the specification and not by calling shoal's code:

- the signed content is ``<webhook-id>.<webhook-timestamp>.<raw body>``;
- the key is the secret with its ``whsec_`` prefix removed, base64-decoded;
- ``webhook-signature`` is a space-separated list of ``<version>,<base64 signature>``;
  one ``v1`` entry equal (constant-time) to base64(HMAC-SHA256(key, signed content))
  verifies the request;
- a timestamp more than the tolerance (5 minutes) from the receiver's clock, either
  way, is refused (replay protection).
"""
import base64
import hashlib
import hmac
import http.server
import io
import threading
import time

import pytest

from shoal.daemon.runtime.logs import setup_logging

TOLERANCE_SECONDS = 5 * 60


def spec_key(secret: str | bytes) -> bytes:
    """The HMAC key of a ``whsec_<base64>`` secret; a secret without the prefix is its bytes
    (what shoal documents for raw secrets)."""
    if isinstance(secret, str):
        secret = secret.encode("utf-8")
    if secret.startswith(b"whsec_"):
        return base64.b64decode(secret[len(b"whsec_"):])
    return secret


def spec_verify(headers, body: bytes, key: bytes, now: float | None = None) -> str | None:
    """None if the request verifies, else why not."""
    lower = {k.lower(): v for k, v in dict(headers).items()}
    try:
        msg_id, stamp, signatures = (lower["webhook-id"], lower["webhook-timestamp"],
                                     lower["webhook-signature"])
    except KeyError as exc:
        return f"missing header {exc}"
    if not stamp.isdigit():
        return "bad timestamp"
    now = time.time() if now is None else now
    if abs(now - int(stamp)) > TOLERANCE_SECONDS:
        return "timestamp outside the tolerance"
    content = msg_id.encode() + b"." + stamp.encode() + b"." + body
    expected = base64.b64encode(hmac.new(key, content, hashlib.sha256).digest())
    for entry in signatures.split(" "):
        version, _, sig = entry.partition(",")
        if version == "v1" and hmac.compare_digest(sig.encode(), expected):
            return None
    return "no signature matches"


class LoopbackReceiver:
    """``http.server`` on 127.0.0.1; ``decide(path, headers, body)`` gives each POST's
    status. ``requests``: what ``decide`` recorded, in arrival order (under ``lock``)."""

    def __init__(self, decide):
        self.lock = threading.Lock()
        self.requests = []

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self):
                body = self.rfile.read(int(self.headers["Content-Length"]))
                status, extra = decide(self.path, self.headers, body)
                self.send_response(status)
                for name, value in extra.items():
                    self.send_header(name, value)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                pass

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.url = f"http://127.0.0.1:{self.port}/hook"
        self.thread = threading.Thread(target=self.server.serve_forever,
                                       kwargs={"poll_interval": 0.05}, name="receiver")

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(5)


class VerifyingReceiver(LoopbackReceiver):
    """Verifies every POST: 204 if it verifies, 401 if not, 500 while ``failures`` remain.
    ``requests``: (status, reason, headers, body) in arrival order."""

    def __init__(self, key: bytes):
        self.key = key
        self.failures = 0
        super().__init__(self._decide)

    def _decide(self, path, headers, body):
        reason = spec_verify(headers, body, self.key)
        with self.lock:
            if reason is not None:
                status = 401
            elif self.failures > 0:
                self.failures -= 1
                status = 500
            else:
                status = 204
            self.requests.append((status, reason, dict(headers), body))
        return status, {}

    def taken(self) -> list:
        with self.lock:
            return list(self.requests)


@pytest.fixture
def log():
    """shoal's JSON log lines of the test, in a buffer."""
    buf = io.StringIO()
    setup_logging("info", stream=buf)
    yield buf
    setup_logging("info")
