#!/usr/bin/env bash
# Local single-node Apache Kafka (KRaft: broker and controller in one JVM) for
# tidewatch's development loop and its tests. No container engine is needed:
# the broker runs from the jars Maven copies into an ignored cache.
#
# usage: kafka.sh fetch | start | stop [--keep-data] | restart | status | logs [-n LINES] [-f] | properties
#
#   fetch     copy the broker's jars into <cache>/libs (skipped when they match pom.xml)
#   start     fetch if needed, format the data dir once, start in the background and
#             wait until the broker answers a metadata request; says so if already up
#   stop      SIGTERM, wait, then SIGKILL; removes the data dir unless --keep-data
#   restart   stop --keep-data, then start (topics and committed records survive)
#   status    exit 0 when running (and say whether it answers), 3 when not
#   logs      tail the broker log
#   properties  print the server.properties that start would write (nothing is started)
#
# Environment (TIDEWATCH_LOCAL_KAFKA_*, never TIDEWATCH_KAFKA_*: that prefix is tidewatch's own
# [kafka] config overrides, and a broker variable there would make `tidewatch run` refuse its config):
#   TIDEWATCH_LOCAL_KAFKA_HOME             cache dir (default <repo>/.cache/kafka)
#   TIDEWATCH_LOCAL_KAFKA_PORT             client port on 127.0.0.1 (default 19092)
#   TIDEWATCH_LOCAL_KAFKA_CONTROLLER_PORT  controller port (default client port + 1)
#   TIDEWATCH_LOCAL_KAFKA_TLS_PORT         opt-in: also listen with TLS (an SSL listener) on this
#                                          port; unset, the default, means no TLS listener at all
#   TIDEWATCH_LOCAL_KAFKA_TLS_KEYSTORE     PKCS12 keystore with the broker's key and certificate
#   TIDEWATCH_LOCAL_KAFKA_TLS_TRUSTSTORE   PKCS12 truststore (optional; only used for client certificates)
#   TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD     password of both stores (throwaway test stores only)
#   TIDEWATCH_LOCAL_KAFKA_START_TIMEOUT    seconds to wait for readiness (default 90)
#   TIDEWATCH_LOCAL_KAFKA_STOP_TIMEOUT     seconds between SIGTERM and SIGKILL (default 30)
#   TIDEWATCH_LOCAL_KAFKA_HEAP             JVM heap flags (default "-Xms128m -Xmx512m")
#   TIDEWATCH_LOCAL_KAFKA_JVM_OPTS         more JVM flags, appended (later flags win)
#   TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES file appended to server.properties (later keys win)
#   TIDEWATCH_PYTHON                       interpreter with confluent_kafka, for the readiness probe
#   JAVA_HOME                              JDK to run (default: java on PATH; Java 17+)
set -euo pipefail

HERE="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
REPO="$(cd "$HERE/../.." && pwd)"
KAFKA_HOME_DIR="${TIDEWATCH_LOCAL_KAFKA_HOME:-$REPO/.cache/kafka}"
LIBS="$KAFKA_HOME_DIR/libs"
DATA="$KAFKA_HOME_DIR/data"
PID_FILE="$KAFKA_HOME_DIR/broker.pid"
LOG_FILE="$KAFKA_HOME_DIR/broker.log"
PROPS="$KAFKA_HOME_DIR/server.properties"
POM="$HERE/pom.xml"
LOG4J_CONFIG="$HERE/log4j2.xml"

# Loopback only: this broker is for one machine's tests, never for a network.
HOST=127.0.0.1
PORT="${TIDEWATCH_LOCAL_KAFKA_PORT:-19092}"
CONTROLLER_PORT="${TIDEWATCH_LOCAL_KAFKA_CONTROLLER_PORT:-}"  # default PORT + 1, set by check_ports
# Opt-in TLS listener; empty keeps the broker exactly as it is without it.
TLS_PORT="${TIDEWATCH_LOCAL_KAFKA_TLS_PORT:-}"
START_TIMEOUT="${TIDEWATCH_LOCAL_KAFKA_START_TIMEOUT:-90}"
STOP_TIMEOUT="${TIDEWATCH_LOCAL_KAFKA_STOP_TIMEOUT:-30}"
# A test broker holds a handful of small topics; 512 MiB is plenty and leaves the
# 2-core CI machine's memory to the test processes.
HEAP="${TIDEWATCH_LOCAL_KAFKA_HEAP:--Xms128m -Xmx512m}"
JAVA="${JAVA_HOME:+$JAVA_HOME/bin/}java"
TAIL_LINES=60

log() { printf 'kafka.sh: %s\n' "$*"; }
die() { printf 'kafka.sh: error: %s\n' "$*" >&2; exit 1; }

pick_python() {
    if [[ -n "${TIDEWATCH_PYTHON:-}" ]]; then
        printf '%s' "$TIDEWATCH_PYTHON"
    elif [[ -x "$REPO/.venv/bin/python" ]]; then
        printf '%s' "$REPO/.venv/bin/python"
    else
        printf '%s' python3
    fi
}

is_port() { [[ "$1" =~ ^[0-9]{1,5}$ ]] && ((10#$1 > 0 && 10#$1 < 65536)); }

check_ports() {
    is_port "$PORT" || die "TIDEWATCH_LOCAL_KAFKA_PORT='$PORT' is not a TCP port number"
    [[ -n "$CONTROLLER_PORT" ]] || CONTROLLER_PORT=$((10#$PORT + 1))
    is_port "$CONTROLLER_PORT" || die "controller port '$CONTROLLER_PORT' is not a TCP port number"
    [[ "$PORT" != "$CONTROLLER_PORT" ]] || die "client and controller port are both $PORT"
    if [[ -n "$TLS_PORT" ]]; then
        is_port "$TLS_PORT" || die "TIDEWATCH_LOCAL_KAFKA_TLS_PORT='$TLS_PORT' is not a TCP port number"
        [[ "$TLS_PORT" != "$PORT" && "$TLS_PORT" != "$CONTROLLER_PORT" ]] ||
            die "TLS port $TLS_PORT is also the client or controller port"
        [[ -n "${TIDEWATCH_LOCAL_KAFKA_TLS_KEYSTORE:-}" ]] ||
            die "TIDEWATCH_LOCAL_KAFKA_TLS_PORT is set but TIDEWATCH_LOCAL_KAFKA_TLS_KEYSTORE is not"
        [[ -n "${TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD:-}" ]] ||
            die "TIDEWATCH_LOCAL_KAFKA_TLS_PORT is set but TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD is not"
    fi
}

# --- process bookkeeping ---------------------------------------------------

# True when PID is a live (not zombie) JVM running kafka.Kafka with OUR properties
# file. The pid file alone is not trusted: after a reboot or a crash its number may
# belong to an unrelated process, which we must never signal.
is_our_broker() {
    local pid="$1" stat state cmdline
    [[ "$pid" =~ ^[0-9]+$ ]] || return 1
    stat="$(cat "/proc/$pid/stat" 2>/dev/null)" || return 1
    # The state field follows the parenthesised command name, which may hold spaces.
    state="${stat##*) }"
    state="${state%% *}"
    [[ "$state" != Z ]] || return 1
    cmdline="$(tr '\0' ' ' <"/proc/$pid/cmdline" 2>/dev/null)" || return 1
    [[ "$cmdline" == *kafka.Kafka* && "$cmdline" == *"$PROPS"* ]]
}

running_pid() {
    local pid
    [[ -f "$PID_FILE" ]] || return 1
    pid="$(cat "$PID_FILE" 2>/dev/null)" || return 1
    if is_our_broker "$pid"; then
        printf '%s' "$pid"
        return 0
    fi
    return 1
}

# Serialise fetch/start/stop between concurrent callers (two pytest sessions, a
# developer's shell) sharing one cache. fd 9 is closed for the broker itself so
# the lock is released when this script exits.
take_lock() {
    mkdir -p "$KAFKA_HOME_DIR"
    exec 9>"$KAFKA_HOME_DIR/.lock"
    flock -w 300 9 || die "another kafka.sh holds $KAFKA_HOME_DIR/.lock"
}

# --- fetch -----------------------------------------------------------------

pom_digest() { sha256sum "$POM" | cut -d' ' -f1; }

libs_current() {
    [[ -f "$LIBS/.pom-sha256" ]] && [[ "$(cat "$LIBS/.pom-sha256")" == "$(pom_digest)" ]] &&
        compgen -G "$LIBS/kafka_2.13-*.jar" >/dev/null
}

cmd_fetch() {
    if libs_current; then
        log "jars present in $LIBS"
        return 0
    fi
    if running_pid >/dev/null; then
        die "the broker is running from $LIBS; stop it before fetching new jars"
    fi
    command -v mvn >/dev/null || die "mvn not found (Maven is needed once, to fetch the broker's jars)"
    local partial="$KAFKA_HOME_DIR/libs.partial.$$" t0=$EPOCHREALTIME
    rm -rf "$partial"
    mkdir -p "$partial"
    log "fetching broker jars with Maven into $LIBS"
    # -q -B: no progress bars or banners; errors still get through. Maven 3.8
    # prints bare colour resets even with -B, hence the sed. Copy into a scratch
    # dir and swap it in, so an interrupted fetch never leaves a half filled
    # libs/ that the next run would take for complete.
    if ! (cd "$HERE" && mvn -q -B -Dstyle.color=never -f "$POM" \
        dependency:copy-dependencies -DoutputDirectory="$partial" 2>&1 |
        sed -u 's/\x1b\[[0-9;]*m//g' >&2); then
        rm -rf "$partial"
        die "Maven could not fetch the jars (see its output above)"
    fi
    pom_digest >"$partial/.pom-sha256"
    rm -rf "$LIBS"
    mv "$partial" "$LIBS"
    log "fetched $(find "$LIBS" -name '*.jar' | wc -l) jars in $(elapsed "$t0")s"
}

# --- configuration ---------------------------------------------------------

# Listener layout in one place. The SSL listener is appended only when
# TIDEWATCH_LOCAL_KAFKA_TLS_PORT is set; its ssl.* settings come from tls_properties.
listeners() {
    printf 'PLAINTEXT://%s:%s,CONTROLLER://%s:%s' "$HOST" "$PORT" "$HOST" "$CONTROLLER_PORT"
    [[ -z "$TLS_PORT" ]] || printf ',SSL://%s:%s' "$HOST" "$TLS_PORT"
}
advertised_listeners() {
    printf 'PLAINTEXT://%s:%s' "$HOST" "$PORT"
    [[ -z "$TLS_PORT" ]] || printf ',SSL://%s:%s' "$HOST" "$TLS_PORT"
}
protocol_map() {
    printf 'PLAINTEXT:PLAINTEXT,CONTROLLER:PLAINTEXT'
    [[ -z "$TLS_PORT" ]] || printf ',SSL:SSL'
}

# ssl.* settings of the opt-in SSL listener (nothing when it is off). Clients
# check the broker's certificate; the broker asks none of them (ssl.client.auth
# keeps its default, none). PLAINTEXT stays the inter-broker and probe listener.
tls_properties() {
    [[ -n "$TLS_PORT" ]] || return 0
    printf '\n# --- opt-in TLS listener (TIDEWATCH_LOCAL_KAFKA_TLS_PORT) ---\n'
    printf '# PKCS12 stores made by the caller (the tests make a throwaway CA with openssl).\n'
    printf 'ssl.keystore.type=PKCS12\n'
    printf 'ssl.keystore.location=%s\n' "$TIDEWATCH_LOCAL_KAFKA_TLS_KEYSTORE"
    printf 'ssl.keystore.password=%s\n' "$TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD"
    printf 'ssl.key.password=%s\n' "$TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD"
    if [[ -n "${TIDEWATCH_LOCAL_KAFKA_TLS_TRUSTSTORE:-}" ]]; then
        printf 'ssl.truststore.type=PKCS12\n'
        printf 'ssl.truststore.location=%s\n' "$TIDEWATCH_LOCAL_KAFKA_TLS_TRUSTSTORE"
        printf 'ssl.truststore.password=%s\n' "$TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD"
    fi
}

render_properties() {
    {
        cat <<EOF
# Generated by deploy/local-kafka/kafka.sh on every start; edit the script, not this file.
# Only settings that differ from Kafka's defaults (or that KRaft requires) are here.

# --- KRaft single node -------------------------------------------------------
# One JVM is both broker and controller: the smallest real cluster, one process
# to start, watch and stop in tests.
process.roles=broker,controller
node.id=1
# Dynamic quorum (formatted with --standalone): the controller finds the quorum
# through this address instead of a fixed controller.quorum.voters list.
controller.quorum.bootstrap.servers=$HOST:$CONTROLLER_PORT
controller.listener.names=CONTROLLER

# --- listeners: loopback only --------------------------------------------------
# Bound to 127.0.0.1 so nothing off this machine can reach the test broker.
listeners=$(listeners)
advertised.listeners=$(advertised_listeners)
# CONTROLLER is not in the default map; the broker refuses to start without it.
listener.security.protocol.map=$(protocol_map)
inter.broker.listener.name=PLAINTEXT

# --- storage ---------------------------------------------------------------
# Inside the ignored cache, so 'stop' can wipe it and a fresh checkout starts clean.
log.dirs=$DATA

# --- internal topics on one node -----------------------------------------------
# Defaults are replication factor 3 and min ISR 2, which a single node can never
# satisfy: group offsets, transactions and share groups would fail to start.
offsets.topic.replication.factor=1
transaction.state.log.replication.factor=1
transaction.state.log.min.isr=1
share.coordinator.state.topic.replication.factor=1
share.coordinator.state.topic.min.isr=1
# Default 50 partitions each; the first consumer group / transactional producer /
# share group then waits while 50 partitions are created on a 2-core machine.
# One partition per internal topic is enough for a test broker.
offsets.topic.num.partitions=1
transaction.state.log.num.partitions=1
share.coordinator.state.topic.num.partitions=1

# --- consumer groups -----------------------------------------------------------
# Default 3000 ms: the first join of every new group would wait 3 s for more
# members. Tests create many short-lived groups.
group.initial.rebalance.delay.ms=0
# Default 6000 ms: lets a test ask for a short session.timeout.ms (classic
# protocol) so a killed consumer's partitions move on within about a second.
group.min.session.timeout.ms=1000

# --- transactions ----------------------------------------------------------------
# Default 10000 ms: how often the coordinator looks for transactions past their
# transaction.timeout.ms and aborts them. A test that kills a transactional
# producer mid-transaction waits for that abort before read_committed consumers
# move past the open transaction, so check every second instead.
transaction.abort.timed.out.transaction.cleanup.interval.ms=1000
EOF
        tls_properties
        if [[ -n "${TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES:-}" ]]; then
            [[ -f "$TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES" ]] ||
                die "TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES=$TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES is not a file"
            printf '\n# --- appended from %s (later keys win) ---\n' "$TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES"
            cat "$TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES"
        fi
    }
}

write_properties() {
    mkdir -p "$KAFKA_HOME_DIR"
    render_properties >"$PROPS.tmp"
    mv "$PROPS.tmp" "$PROPS"
}

jvm_opts() {
    # TieredStopAtLevel=1 (C1 compiler only): on a busy 2-core machine the C2
    # compiler threads fight the broker's own start-up for CPU; measured here,
    # start-to-ready fell from about 15 s to about 8 s with the machine loaded.
    # A test broker never runs long enough for C2's faster code to pay back.
    # shellcheck disable=SC2086  # HEAP and JVM_OPTS are lists of flags on purpose
    printf '%s\n' $HEAP \
        -XX:TieredStopAtLevel=1 \
        -XX:+UseG1GC -XX:MaxGCPauseMillis=20 \
        -XX:+ExitOnOutOfMemoryError \
        -Djava.awt.headless=true \
        "-Dlog4j2.configurationFile=$LOG4J_CONFIG" \
        ${TIDEWATCH_LOCAL_KAFKA_JVM_OPTS:-}
}

random_cluster_id() {
    # Kafka's cluster id: 16 random bytes, URL-safe base64 without padding. A
    # leading '-' is avoided because the tools would read it as an option.
    "$(pick_python)" -c '
import base64, uuid
while True:
    cid = base64.urlsafe_b64encode(uuid.uuid4().bytes).rstrip(b"=").decode()
    if not cid.startswith("-"):
        print(cid)
        break
'
}

format_storage() {
    local cid
    cid="$(random_cluster_id)"
    log "formatting $DATA (cluster id $cid)"
    mkdir -p "$DATA"
    local -a opts
    mapfile -t opts < <(jvm_opts)
    if ! "$JAVA" "${opts[@]}" -cp "$LIBS/*" kafka.tools.StorageTool \
        format -t "$cid" -c "$PROPS" --standalone >>"$LOG_FILE" 2>&1; then
        tail -n "$TAIL_LINES" "$LOG_FILE" >&2
        rm -rf "$DATA"
        die "formatting the storage failed (log above, full log: $LOG_FILE)"
    fi
}

# --- readiness probe ---------------------------------------------------------

cluster_id() { sed -n 's/^cluster\.id=//p' "$DATA/meta.properties" 2>/dev/null; }

# True when something accepts TCP connections on 127.0.0.1:$1.
port_in_use() { (exec 3<>"/dev/tcp/$HOST/$1") 2>/dev/null; }

# Poll (never a fixed sleep) until the broker answers a metadata request with a
# broker, a controller and OUR cluster id, within DEADLINE seconds. The id check
# keeps another broker that happens to own the port from passing for ours.
# Exit codes: 0 ready, 1 the process died, 2 deadline passed, 3 confluent_kafka
# is missing, 4 a different cluster answers on the port.
probe() {
    local pid="$1" deadline="$2"
    "$(pick_python)" - "$HOST" "$PORT" "$pid" "$deadline" "$(cluster_id)" <<'PY'
import socket, sys, time

host, port, pid, budget = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
expected_cluster = sys.argv[5]
try:
    from confluent_kafka import KafkaException
    from confluent_kafka.admin import AdminClient
except ImportError:
    print("kafka.sh: the readiness probe needs confluent_kafka (set TIDEWATCH_PYTHON)", file=sys.stderr)
    sys.exit(3)

deadline = time.monotonic() + budget


def alive() -> bool:
    if pid <= 0:
        return True
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except (OSError, IndexError):
        return False


# Phase 1: wait for the listener to accept TCP, cheaply, so librdkafka does not
# log a connection failure (and back off) for every early attempt.
while True:
    if not alive():
        sys.exit(1)
    if time.monotonic() > deadline:
        sys.exit(2)
    try:
        socket.create_connection((host, port), timeout=0.5).close()
        break
    except OSError:
        time.sleep(0.05)

# Phase 2: a real metadata round trip. The broker opens its listener before it
# has caught up with the controller, so a connect alone is not "ready".
admin = AdminClient({
    "bootstrap.servers": f"{host}:{port}",
    "reconnect.backoff.ms": 50,
    "reconnect.backoff.max.ms": 200,
    "log_level": 2,
})
while True:
    if not alive():
        sys.exit(1)
    if time.monotonic() > deadline:
        sys.exit(2)
    try:
        md = admin.list_topics(timeout=1)
    except KafkaException:
        time.sleep(0.05)
        continue
    if md.brokers and md.controller_id >= 0:
        if expected_cluster and md.cluster_id != expected_cluster:
            print(f"kafka.sh: {host}:{port} answers as cluster {md.cluster_id}, "
                  f"not this broker's {expected_cluster}", file=sys.stderr)
            sys.exit(4)
        sys.exit(0)
    time.sleep(0.05)
PY
}

# --- commands ----------------------------------------------------------------

elapsed() { awk -v a="$1" -v b="$EPOCHREALTIME" 'BEGIN { printf "%.1f", b - a }'; }

cmd_start() {
    check_ports
    local pid
    if pid="$(running_pid)"; then
        log "already running (pid $pid) at $HOST:$PORT"
        return 0
    fi
    rm -f "$PID_FILE"
    local p
    for p in "$PORT" "$CONTROLLER_PORT" ${TLS_PORT:+"$TLS_PORT"}; do
        if port_in_use "$p"; then
            die "something already listens on $HOST:$p (another broker? 'ss -ltnp' shows who); set TIDEWATCH_LOCAL_KAFKA_PORT to use other ports"
        fi
    done
    libs_current || cmd_fetch
    command -v "$JAVA" >/dev/null || die "java not found (set JAVA_HOME or put Java 17+ on PATH)"
    local t0=$EPOCHREALTIME
    # Keep the previous run's log beside the new one: after a restart test the
    # first half of the story is often the interesting one.
    [[ -f "$LOG_FILE" ]] && mv -f "$LOG_FILE" "$LOG_FILE.1"
    : >"$LOG_FILE"
    write_properties
    local formatted_now=0
    if [[ ! -f "$DATA/meta.properties" ]]; then
        format_storage
        formatted_now=1
    fi
    local -a opts
    mapfile -t opts < <(jvm_opts)
    # setsid: a Ctrl-C in the terminal running pytest must not kill the broker
    # before the fixture's own clean stop. fd 9 (the lock) is not inherited.
    setsid "$JAVA" "${opts[@]}" -cp "$LIBS/*" kafka.Kafka "$PROPS" \
        >>"$LOG_FILE" 2>&1 </dev/null 9>&- &
    pid=$!
    printf '%s\n' "$pid" >"$PID_FILE"
    local rc=0
    probe "$pid" "$START_TIMEOUT" || rc=$?
    if ((rc == 0)); then
        log "ready at $HOST:$PORT (pid $pid) after $(elapsed "$t0")s"
        return 0
    fi
    local why
    case $rc in
        1) why="the broker process exited" ;;
        2) why="it did not answer within ${START_TIMEOUT}s" ;;
        3) why="the readiness probe could not run" ;;
        4) why="another Kafka cluster answers on $HOST:$PORT" ;;
        *) why="the readiness probe failed (exit $rc)" ;;
    esac
    {
        printf -- '--- last %s lines of %s ---\n' "$TAIL_LINES" "$LOG_FILE"
        tail -n "$TAIL_LINES" "$LOG_FILE"
        printf -- '--- end of broker log ---\n'
    } >&2
    stop_pid "$pid" 5 || true
    rm -f "$PID_FILE"
    # A data dir formatted by this failed attempt holds nothing worth keeping;
    # one that existed before (a restart) is left for the next try.
    ((formatted_now == 0)) || rm -rf "$DATA"
    die "broker did not start: $why"
}

# SIGTERM (Kafka then shuts down cleanly: flushes logs, writes its clean-shutdown
# marker), wait up to WAIT seconds, then SIGKILL.
stop_pid() {
    local pid="$1" wait_s="$2" t0=$EPOCHREALTIME
    is_our_broker "$pid" || return 0
    kill -TERM "$pid" 2>/dev/null || true
    while is_our_broker "$pid"; do
        if awk -v a="$t0" -v b="$EPOCHREALTIME" -v w="$wait_s" 'BEGIN { exit !(b - a > w) }'; then
            log "no exit ${wait_s}s after SIGTERM; sending SIGKILL to $pid"
            kill -KILL "$pid" 2>/dev/null || true
            while is_our_broker "$pid"; do sleep 0.05; done
            return 1
        fi
        sleep 0.05
    done
    return 0
}

cmd_stop() {
    local keep=0 arg
    for arg in "$@"; do
        case "$arg" in
            --keep-data) keep=1 ;;
            *) die "stop: unknown option '$arg' (only --keep-data)" ;;
        esac
    done
    local pid t0=$EPOCHREALTIME
    if pid="$(running_pid)"; then
        stop_pid "$pid" "$STOP_TIMEOUT" || true
        log "stopped pid $pid in $(elapsed "$t0")s"
    else
        log "not running"
    fi
    rm -f "$PID_FILE"
    if ((keep == 0)) && [[ -d "$DATA" ]]; then
        rm -rf "$DATA"
        log "removed $DATA"
    fi
}

cmd_restart() {
    cmd_stop --keep-data
    cmd_start
}

cmd_status() {
    check_ports
    local pid
    if pid="$(running_pid)"; then
        if probe 0 3 2>/dev/null; then
            log "running (pid $pid) at $HOST:$PORT, answering"
        else
            log "running (pid $pid) at $HOST:$PORT, not answering yet"
        fi
        return 0
    fi
    log "not running"
    return 3
}

cmd_logs() {
    local lines=100 follow=0
    while (($#)); do
        case "$1" in
            -n) lines="${2:?-n needs a number}"; shift 2 ;;
            -f) follow=1; shift ;;
            *) die "logs: unknown option '$1' (-n LINES, -f)" ;;
        esac
    done
    [[ -f "$LOG_FILE" ]] || die "no log yet at $LOG_FILE"
    if ((follow)); then
        exec tail -n "$lines" -F "$LOG_FILE"
    fi
    tail -n "$lines" "$LOG_FILE"
}

usage() {
    sed -n '2,/^set -euo/p' "${BASH_SOURCE[0]}" | sed '$d' | sed 's/^# \{0,1\}//'
}

main() {
    local cmd="${1:-}"
    (($#)) && shift
    case "$cmd" in
        fetch) take_lock; cmd_fetch "$@" ;;
        start) take_lock; cmd_start "$@" ;;
        stop) take_lock; cmd_stop "$@" ;;
        restart) take_lock; cmd_restart "$@" ;;
        status) cmd_status "$@" ;;
        logs) cmd_logs "$@" ;;
        properties) check_ports; render_properties ;;
        -h | --help | help) usage ;;
        *) usage >&2; exit 2 ;;
    esac
}

main "$@"
