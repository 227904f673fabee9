#!/usr/bin/env python3
"""Webhook receiver for posteriord's alert tests: a real HTTP server that checks each request's
signature with Python's own hmac module (the independent implementation of HMAC-SHA256 the
tests name) and appends one JSON line per request to a file.

usage: receiver.py --port P --secret S --out FILE
"""
import argparse
import hashlib
import hmac
import json
from http.server import BaseHTTPRequestHandler, HTTPServer


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--secret", required=True)
    ap.add_argument("--out", required=True)
    args = ap.parse_args()
    secret = args.secret.encode()

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self):
            body = self.rfile.read(int(self.headers.get("content-length", "0")))
            expected = "sha256=" + hmac.new(secret, body, hashlib.sha256).hexdigest()
            got = self.headers.get("posteriord-signature", "")
            record = {
                "path": self.path,
                "valid": hmac.compare_digest(expected, got),
                "idempotency_key": self.headers.get("idempotency-key"),
                "content_type": self.headers.get("content-type"),
                "event": json.loads(body),
            }
            with open(args.out, "a") as f:
                f.write(json.dumps(record) + "\n")
            self.send_response(204)
            self.end_headers()

        def log_message(self, *_):
            pass

    HTTPServer(("127.0.0.1", args.port), Handler).serve_forever()


if __name__ == "__main__":
    main()
