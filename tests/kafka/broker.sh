#!/usr/bin/env bash
# Apache Kafka for the test suite: resolves the broker from Maven Central (tests/kafka/pom.xml,
# a pinned 4.x) into a cached classpath folder and runs KRaft nodes on loopback.
#
#   broker.sh fetch               resolve the jars (once; cached), print the classpath folder
#   broker.sh start DIR [NODES]   format and start NODES (1 or 3) combined broker+controller
#                                 nodes with their data in DIR; waits until every broker
#                                 answers metadata requests; prints the bootstrap list, which
#                                 is also written to DIR/bootstrap
#   broker.sh stop DIR            stop every node of DIR (SIGTERM, then SIGKILL after 20 s)
#   broker.sh kill DIR K          SIGKILL node K (1-based) of DIR, as a crash would
#   broker.sh restart DIR K       start node K of DIR again on the same ports and data
#   broker.sh wait DIR            wait until every node of DIR answers metadata requests
#
# Environment: POSTERIORD_CACHE (default ~/.cache/posteriord) holds the jars;
# JAVA (default java) runs them. Each node logs to DIR/node-K/broker.log.
set -euo pipefail

HERE="$(cd "$(dirname "$0")" && pwd)"
KAFKA_VERSION="$(sed -n 's:.*<kafka.version>\(.*\)</kafka.version>.*:\1:p' "$HERE/pom.xml")"
CACHE="${POSTERIORD_CACHE:-$HOME/.cache/posteriord}"
LIB="$CACHE/kafka-$KAFKA_VERSION/lib"
JAVA="${JAVA:-java}"
# A fixed cluster id keeps formatting deterministic; every DIR is its own cluster anyway.
CLUSTER_ID="cG9zdGVyaW9yZC10ZXN0"

die() { echo "broker.sh: $*" >&2; exit 1; }

fetch() {
    if [[ ! -f "$LIB/.complete" ]]; then
        echo "broker.sh: resolving org.apache.kafka:kafka_2.13:$KAFKA_VERSION from Maven Central into $LIB" >&2
        rm -rf "$LIB"
        mkdir -p "$LIB"
        # Maven's own build folder goes to a temporary place so the checkout stays clean.
        local build
        build="$(mktemp -d)"
        mvn -q -B -f "$HERE/pom.xml" package \
            -Dbroker.lib="$LIB" -DbuildDirectory="$build" \
            -Dproject.build.directory="$build" >&2 \
            || { rm -rf "$build"; die "mvn could not resolve the broker (see above)"; }
        rm -rf "$build" "$HERE/target"
        touch "$LIB/.complete"
    fi
    echo "$LIB"
}

free_port() {
    python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])'
}

node_props() {
    # $1 = DIR, $2 = node id, $3 = number of nodes
    local dir="$1" id="$2" n="$3" voters="" k
    for k in $(seq 1 "$n"); do
        voters+="${voters:+,}$k@127.0.0.1:$(cat "$dir/node-$k/controller-port")"
    done
    local rf=$(( n >= 3 ? 3 : 1 )) isr=$(( n >= 3 ? 2 : 1 ))
    cat <<EOF
process.roles=broker,controller
node.id=$id
controller.quorum.voters=$voters
listeners=PLAINTEXT://127.0.0.1:$(cat "$dir/node-$id/port"),CONTROLLER://127.0.0.1:$(cat "$dir/node-$id/controller-port")
advertised.listeners=PLAINTEXT://127.0.0.1:$(cat "$dir/node-$id/port")
listener.security.protocol.map=PLAINTEXT:PLAINTEXT,CONTROLLER:PLAINTEXT
controller.listener.names=CONTROLLER
inter.broker.listener.name=PLAINTEXT
log.dirs=$dir/node-$id/data
num.partitions=1
default.replication.factor=$rf
min.insync.replicas=$isr
offsets.topic.replication.factor=$rf
offsets.topic.num.partitions=10
transaction.state.log.replication.factor=$rf
transaction.state.log.min.isr=$isr
share.coordinator.state.topic.replication.factor=$rf
share.coordinator.state.topic.min.isr=$isr
auto.create.topics.enable=true
# Tests start consumers right after the group forms; the default 3 s delay only slows them.
group.initial.rebalance.delay.ms=0
# Loopback tests may run a member with a short session timeout (the default minimum is 6 s).
group.min.session.timeout.ms=3000
log.segment.bytes=16777216
log.retention.check.interval.ms=60000
EOF
}

log4j_config() {
    cat <<'EOF'
status = warn
appender.file.type = File
appender.file.name = file
appender.file.fileName = ${sys:posteriord.broker.log}
appender.file.layout.type = PatternLayout
appender.file.layout.pattern = [%d] %p %m (%c)%n
rootLogger.level = INFO
rootLogger.appenderRef.file.ref = file
logger.kafka.name = kafka
logger.kafka.level = INFO
logger.state.name = state.change.logger
logger.state.level = WARN
logger.request.name = kafka.request.logger
logger.request.level = WARN
EOF
}

launch() {
    # $1 = DIR, $2 = node id: start the node in the background and record its pid.
    local dir="$1" id="$2" node="$1/node-$2"
    # setsid: a node is its own process group, so stopping the test run's shell group
    # never half-stops a broker, and `kill` below reaches the JVM itself.
    setsid "$JAVA" -Xms128m -Xmx768m -XX:+UseG1GC -XX:MaxGCPauseMillis=20 \
        -Djava.awt.headless=true \
        -Dlog4j2.configurationFile="$dir/log4j2.properties" \
        -Dposteriord.broker.log="$node/broker.log" \
        -cp "$LIB/*" kafka.Kafka "$node/server.properties" \
        >"$node/stdout.log" 2>&1 </dev/null &
    echo $! >"$node/pid"
}

wait_ready() {
    # $1 = DIR: poll metadata until every node is listed as a broker (90 s budget).
    local dir="$1" n
    n="$(cat "$dir/nodes")"
    python3 - "$(cat "$dir/bootstrap")" "$n" "$dir" <<'EOF' || die "the cluster in $dir did not become ready; see $dir/node-*/broker.log"
import os, socket, sys, time
from confluent_kafka.admin import AdminClient
bootstrap, n, d = sys.argv[1], int(sys.argv[2]), sys.argv[3]
# log_level 3: the refused connections while the JVM starts are expected, not news.
admin = AdminClient({"bootstrap.servers": bootstrap, "log_level": 2})
deadline = time.time() + 90
last = None
while time.time() < deadline:
    for k in range(1, n + 1):
        pid = int(open(f"{d}/node-{k}/pid").read())
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            print(f"node {k} exited; last lines of {d}/node-{k}/stdout.log:", file=sys.stderr)
            print("".join(open(f"{d}/node-{k}/stdout.log").readlines()[-20:]), file=sys.stderr)
            sys.exit(1)
    try:
        # Each node's own listener must accept connections: the cluster's metadata can
        # still list a node that was just killed, until the controller fences it.
        for k in range(1, n + 1):
            port = int(open(f"{d}/node-{k}/port").read())
            socket.create_connection(("127.0.0.1", port), 1).close()
        md = admin.list_topics(timeout=2)
        if len(md.brokers) >= n:
            sys.exit(0)
        last = f"{len(md.brokers)} of {n} brokers"
    except Exception as e:  # not up yet
        last = str(e)
    time.sleep(0.5)
print(f"not ready after 90 s: {last}", file=sys.stderr)
sys.exit(1)
EOF
}

start() {
    local dir="$1" n="${2:-1}" k
    [[ "$n" == 1 || "$n" == 3 ]] || die "NODES must be 1 or 3, got $n"
    fetch >/dev/null
    mkdir -p "$dir"
    dir="$(cd "$dir" && pwd)"
    echo "$n" >"$dir/nodes"
    log4j_config >"$dir/log4j2.properties"
    local bootstrap=""
    for k in $(seq 1 "$n"); do
        mkdir -p "$dir/node-$k/data"
        free_port >"$dir/node-$k/port"
        free_port >"$dir/node-$k/controller-port"
        bootstrap+="${bootstrap:+,}127.0.0.1:$(cat "$dir/node-$k/port")"
    done
    echo "$bootstrap" >"$dir/bootstrap"
    for k in $(seq 1 "$n"); do
        node_props "$dir" "$k" "$n" >"$dir/node-$k/server.properties"
        "$JAVA" -Dlog4j2.configurationFile="$dir/log4j2.properties" \
            -Dposteriord.broker.log="$dir/node-$k/format.log" \
            -cp "$LIB/*" kafka.tools.StorageTool format \
            --config "$dir/node-$k/server.properties" --cluster-id "$CLUSTER_ID" \
            --ignore-formatted >"$dir/node-$k/format.out" 2>&1 \
            || { cat "$dir/node-$k/format.out" >&2; die "formatting node $k failed"; }
    done
    for k in $(seq 1 "$n"); do launch "$dir" "$k"; done
    wait_ready "$dir"
    echo "$bootstrap"
}

signal_node() {
    # $1 = DIR, $2 = node, $3 = signal
    local pidfile="$1/node-$2/pid"
    [[ -f "$pidfile" ]] || return 0
    kill "-$3" "$(cat "$pidfile")" 2>/dev/null || true
}

alive() { kill -0 "$(cat "$1/node-$2/pid" 2>/dev/null || echo 0)" 2>/dev/null; }

stop() {
    local dir="$1" n k i
    [[ -f "$dir/nodes" ]] || return 0
    n="$(cat "$dir/nodes")"
    for k in $(seq 1 "$n"); do signal_node "$dir" "$k" TERM; done
    for i in $(seq 1 80); do
        local any=""
        for k in $(seq 1 "$n"); do alive "$dir" "$k" && any=1; done
        [[ -z "$any" ]] && return 0
        sleep 0.25
    done
    for k in $(seq 1 "$n"); do signal_node "$dir" "$k" KILL; done
}

cmd="${1:-}"
case "$cmd" in
    fetch) fetch ;;
    start) [[ $# -ge 2 ]] || die "usage: broker.sh start DIR [NODES]"; start "$2" "${3:-1}" ;;
    stop) [[ $# -eq 2 ]] || die "usage: broker.sh stop DIR"; stop "$2" ;;
    kill) [[ $# -eq 3 ]] || die "usage: broker.sh kill DIR K"; signal_node "$2" "$3" KILL
          for _ in $(seq 1 40); do alive "$2" "$3" || exit 0; sleep 0.25; done; die "node $3 did not die" ;;
    restart) [[ $# -eq 3 ]] || die "usage: broker.sh restart DIR K"
          alive "$2" "$3" && die "node $3 of $2 is still running"
          launch "$(cd "$2" && pwd)" "$3" ;;
    wait) [[ $# -eq 2 ]] || die "usage: broker.sh wait DIR"; wait_ready "$2" ;;
    *) die "usage: broker.sh fetch | start DIR [NODES] | stop DIR | kill DIR K | restart DIR K | wait DIR" ;;
esac
