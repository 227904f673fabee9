#!/usr/bin/env python3
"""Independent Kafka consumer for posteriord's tests (Python confluent-kafka).

Reads a topic from the beginning until COUNT messages arrived or TIMEOUT seconds passed, and
prints one JSON object per message: {"key", "value", "headers": {name: value}, "partition",
"offset", "timestamp"} with bytes decoded as UTF-8 (invalid bytes replaced) and the record
timestamp in milliseconds (what a topic dump's timestamp column holds).

usage: consume.py --brokers HOST:PORT --topic T --count N [--timeout S]
"""
import argparse
import json
import time
import uuid

from confluent_kafka import Consumer


def text(b):
    return None if b is None else b.decode("utf-8", "replace")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--brokers", required=True)
    ap.add_argument("--topic", required=True)
    ap.add_argument("--count", type=int, required=True)
    ap.add_argument("--timeout", type=float, default=60)
    args = ap.parse_args()
    c = Consumer({
        "bootstrap.servers": args.brokers,
        "group.id": "posteriord-test-reader-" + uuid.uuid4().hex,
        "auto.offset.reset": "earliest",
        "enable.auto.commit": False,
    })
    c.subscribe([args.topic])
    got = 0
    deadline = time.time() + args.timeout
    while got < args.count and time.time() < deadline:
        m = c.poll(0.5)
        if m is None or m.error():
            continue
        headers = {k: text(v) for k, v in (m.headers() or [])}
        _, timestamp = m.timestamp()
        print(json.dumps({"key": text(m.key()), "value": text(m.value()), "headers": headers,
                          "partition": m.partition(), "offset": m.offset(),
                          "timestamp": timestamp}), flush=True)
        got += 1
    c.close()


if __name__ == "__main__":
    main()
