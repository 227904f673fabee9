#!/usr/bin/env python3
"""Independent Kafka producer for posteriord's tests (Python confluent-kafka, bundled librdkafka).

Reads NDJSON events from a file and produces one message per line to a topic, keyed by the
event's experiment id (the partitioning posteriord documents), or with --key PATH by the value
at a dotted path (a team's unit-keyed topics; lines without it get no key). Lines that are not
JSON objects are produced as-is with no key, so tests can send poison messages too.

With --timestamps, each line is `MILLIS<TAB>EVENT`: the message is produced with that record
timestamp (producer create time, milliseconds since the epoch) — the reference posteriord
checks event times against — and the same file is what `posteriord replay` reads.

usage: produce.py --brokers HOST:PORT --topic T [--partitions N] [--key PATH] [--timestamps] FILE
Prints the number of messages delivered; exits 1 if any delivery failed.
"""
import argparse
import json
import sys

from confluent_kafka import Producer
from confluent_kafka.admin import AdminClient, NewTopic


def ensure_topic(brokers, topic, partitions):
    admin = AdminClient({"bootstrap.servers": brokers})
    existing = admin.list_topics(timeout=20).topics
    if topic in existing:
        return
    futures = admin.create_topics([NewTopic(topic, num_partitions=partitions, replication_factor=-1)])
    for f in futures.values():
        f.result(timeout=30)


def key_at(obj, path):
    for part in path.split("."):
        if not isinstance(obj, dict) or part not in obj:
            return None
        obj = obj[part]
    return str(obj).encode() if isinstance(obj, (str, int)) else None


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--brokers", required=True)
    ap.add_argument("--topic", required=True)
    ap.add_argument("--partitions", type=int, default=3)
    ap.add_argument("--key", default=None, help="dotted path of the key in each line")
    ap.add_argument("--timestamps", action="store_true")
    ap.add_argument("file")
    args = ap.parse_args()

    ensure_topic(args.brokers, args.topic, args.partitions)
    producer = Producer({
        "bootstrap.servers": args.brokers,
        "enable.idempotence": True,
        "linger.ms": 20,
        "client.id": "posteriord-test-producer",
    })
    failures = []
    delivered = [0]

    def on_delivery(err, _msg):
        if err is not None:
            failures.append(str(err))
        else:
            delivered[0] += 1

    with open(args.file, "rb") as f:
        for raw in f:
            line = raw.rstrip(b"\n")
            if not line:
                continue
            timestamp = None
            if args.timestamps:
                millis, line = line.split(b"\t", 1)
                timestamp = int(millis)
            key = None
            try:
                obj = json.loads(line)
                if args.key is not None:
                    key = key_at(obj, args.key)
                elif isinstance(obj, dict) and isinstance(obj.get("experiment"), str):
                    key = obj["experiment"].encode()
            except ValueError:
                pass
            while True:
                try:
                    if timestamp is None:
                        producer.produce(args.topic, value=line, key=key, on_delivery=on_delivery)
                    else:
                        producer.produce(args.topic, value=line, key=key, timestamp=timestamp,
                                         on_delivery=on_delivery)
                    break
                except BufferError:
                    producer.poll(0.1)
            producer.poll(0)
    remaining = producer.flush(60)
    if remaining or failures:
        print(f"undelivered={remaining} failures={failures[:5]}", file=sys.stderr)
        sys.exit(1)
    print(delivered[0])


if __name__ == "__main__":
    main()
