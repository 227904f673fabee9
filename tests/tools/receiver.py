#!/usr/bin/env python3
"""Webhook receiver for posteriord's alert tests: a real HTTP server that checks each request's
Standard Webhooks signature with the independent verifier from PyPI (`standardwebhooks`) and
appends one JSON line per request to a file. As a check that the check can fail, it also asks
the verifier with a different secret, which must refuse.

usage: receiver.py --port P --secret whsec_... --out FILE
"""
import argparse
import base64
import json
from http.server import BaseHTTPRequestHandler, HTTPServer

from standardwebhooks.webhooks import Webhook, WebhookVerificationError


def verifies(hook, body, headers):
    try:
        hook.verify(body, headers)
        return True
    except WebhookVerificationError:
        return False


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--secret", required=True, help="the whsec_<base64> form of the key")
    ap.add_argument("--out", required=True)
    args = ap.parse_args()
    hook = Webhook(args.secret)
    other = Webhook("whsec_" + base64.b64encode(b"some other key").decode())

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self):
            body = self.rfile.read(int(self.headers.get("content-length", "0")))
            headers = {k: v for k, v in self.headers.items()}
            record = {
                "path": self.path,
                "valid": verifies(hook, body, headers),
                "valid_with_other_secret": verifies(other, body, headers),
                "webhook_id": self.headers.get("webhook-id"),
                "webhook_timestamp": self.headers.get("webhook-timestamp"),
                "webhook_signature": self.headers.get("webhook-signature"),
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
