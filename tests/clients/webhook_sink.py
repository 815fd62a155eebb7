"""A real HTTP server for the webhook tests (Python's http.server), which
records every request and checks its signature with Python's own hmac
module, independently of outrider's Rust code.

  webhook_sink.py --port P --dir D [--statuses 500,200] [--secret S]
                  [--location URL]

Listens on 127.0.0.1:P. The n-th request is answered with the n-th status
of --statuses (the last one repeats; default 200); a 3xx answer carries
"Location: URL" when --location is given. Each request appends one JSON
line to D/requests.jsonl:
  {"method", "path", "headers": [[name, value], ...], "body_b64",
   "status", "signature_ok"}
where signature_ok is null without --secret, else whether
Outrider-Signature == "sha256=" + hex(HMAC-SHA256(secret,
Outrider-Timestamp + "." + raw body)) (docs/notices.md §6), compared with
hmac.compare_digest. Prints "ready" once listening; stops on SIGTERM or
when stdin closes.
"""

import argparse
import base64
import hashlib
import hmac
import json
import os
import signal
import sys
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--dir", required=True)
    ap.add_argument("--statuses", default="200")
    ap.add_argument("--secret")
    ap.add_argument("--location")
    args = ap.parse_args()
    statuses = [int(s) for s in args.statuses.split(",")]
    os.makedirs(args.dir, exist_ok=True)
    lock = threading.Lock()
    count = {"n": 0}

    class Handler(BaseHTTPRequestHandler):
        protocol_version = "HTTP/1.1"

        def log_message(self, *a):
            pass

        def do_POST(self):
            length = int(self.headers.get("Content-Length", "0"))
            body = self.rfile.read(length)
            with lock:
                n = count["n"]
                count["n"] += 1
            status = statuses[min(n, len(statuses) - 1)]
            ok = None
            if args.secret is not None:
                ts = self.headers.get("Outrider-Timestamp", "")
                sig = self.headers.get("Outrider-Signature", "")
                want = "sha256=" + hmac.new(
                    args.secret.encode(), ts.encode() + b"." + body, hashlib.sha256
                ).hexdigest()
                ok = hmac.compare_digest(want, sig)
            rec = {
                "method": self.command,
                "path": self.path,
                "headers": [[k, v] for k, v in self.headers.items()],
                "body_b64": base64.b64encode(body).decode(),
                "status": status,
                "signature_ok": ok,
            }
            with lock:
                with open(os.path.join(args.dir, "requests.jsonl"), "a") as f:
                    f.write(json.dumps(rec) + "\n")
            reply = b'{"ok": %s}' % (b"true" if 200 <= status < 300 else b"false")
            self.send_response(status)
            if 300 <= status < 400 and args.location:
                self.send_header("Location", args.location)
            self.send_header("Content-Type", "application/json")
            self.send_header("Content-Length", str(len(reply)))
            self.end_headers()
            self.wfile.write(reply)

        do_GET = do_POST
        do_PUT = do_POST

    server = ThreadingHTTPServer(("127.0.0.1", args.port), Handler)
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True).start()
    print("ready", flush=True)

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())

    def watch_stdin():
        sys.stdin.read()
        stop.set()

    threading.Thread(target=watch_stdin, daemon=True).start()
    stop.wait()
    server.shutdown()


if __name__ == "__main__":
    main()
