#!/usr/bin/env bash
# Local development stack for `ripen run`: a throwaway redis-server on
# 127.0.0.1:6379 (no persistence) and the in-process Kafka-compatible
# broker `ripen devbroker` on 127.0.0.1:9092, both in the background.
#
#   deploy/dev-stack.sh start    start both (default)
#   deploy/dev-stack.sh stop     stop what start started (by pid file)
#   deploy/dev-stack.sh status   show what runs
#
# Then: ripen run --log console
#
# Pid files and logs live in $RIPEN_DEV_DIR (default: a ripen-dev-stack
# directory under $XDG_RUNTIME_DIR or /tmp). The ripen binary is $RIPEN_BIN,
# else `ripen` on PATH, else it is built from this checkout into that
# directory. Ports: $RIPEN_DEV_REDIS_PORT (6379), $RIPEN_DEV_KAFKA_ADDR
# (127.0.0.1:9092).
set -euo pipefail

repo="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
dir="${RIPEN_DEV_DIR:-${XDG_RUNTIME_DIR:-/tmp}/ripen-dev-stack}"
redis_port="${RIPEN_DEV_REDIS_PORT:-6379}"
kafka_addr="${RIPEN_DEV_KAFKA_ADDR:-127.0.0.1:9092}"

die() { echo "dev-stack: $*" >&2; exit 1; }

# alive PIDFILE NAME: true if the pid file names a running process whose
# command line mentions NAME (so a recycled pid is never signalled).
alive() {
  local pidfile=$1 name=$2 pid
  [[ -f $pidfile ]] || return 1
  pid=$(<"$pidfile")
  [[ $pid =~ ^[0-9]+$ ]] || return 1
  kill -0 "$pid" 2>/dev/null || return 1
  if [[ -r /proc/$pid/cmdline ]]; then
    tr '\0' ' ' <"/proc/$pid/cmdline" | grep -q -- "$name" || return 1
  fi
  return 0
}

ripen_bin() {
  if [[ -n ${RIPEN_BIN:-} ]]; then
    echo "$RIPEN_BIN"
  elif command -v ripen >/dev/null 2>&1; then
    command -v ripen
  else
    command -v go >/dev/null 2>&1 || die "no ripen binary on PATH and no go toolchain to build one"
    echo "dev-stack: building ripen into $dir" >&2
    (cd "$repo" && go build -o "$dir/ripen" ./cmd/ripen) || die "go build failed"
    echo "$dir/ripen"
  fi
}

# wait_port HOST PORT: wait up to 10 s for a TCP listener.
wait_port() {
  local host=$1 port=$2
  for _ in $(seq 1 100); do
    if (exec 3<>"/dev/tcp/$host/$port") 2>/dev/null; then
      return 0
    fi
    sleep 0.1
  done
  return 1
}

start() {
  mkdir -p "$dir"
  if alive "$dir/redis.pid" redis-server; then
    echo "redis-server already running (pid $(<"$dir/redis.pid"))"
  else
    command -v redis-server >/dev/null 2>&1 || die "redis-server not found (apt-get install redis-server)"
    redis-server --port "$redis_port" --bind 127.0.0.1 --save "" --appendonly no \
      --daemonize no --dir "$dir" >"$dir/redis.log" 2>&1 &
    echo $! >"$dir/redis.pid"
    wait_port 127.0.0.1 "$redis_port" || die "redis-server did not start; see $dir/redis.log"
    echo "redis-server on 127.0.0.1:$redis_port (pid $(<"$dir/redis.pid"))"
  fi
  if alive "$dir/devbroker.pid" devbroker; then
    echo "devbroker already running (pid $(<"$dir/devbroker.pid"))"
  else
    local bin
    bin=$(ripen_bin)
    "$bin" devbroker --addr "$kafka_addr" >"$dir/devbroker.log" 2>&1 &
    echo $! >"$dir/devbroker.pid"
    wait_port "${kafka_addr%:*}" "${kafka_addr##*:}" || die "devbroker did not start; see $dir/devbroker.log"
    echo "devbroker on $kafka_addr (pid $(<"$dir/devbroker.pid"))"
  fi
  echo "logs and pid files in $dir; stop with: $0 stop"
}

# stop_one PIDFILE NAME: SIGTERM, wait up to 5 s, then SIGKILL.
stop_one() {
  local pidfile=$1 name=$2 pid
  if ! alive "$pidfile" "$name"; then
    rm -f "$pidfile"
    echo "$name not running"
    return 0
  fi
  pid=$(<"$pidfile")
  kill -TERM "$pid"
  for _ in $(seq 1 50); do
    kill -0 "$pid" 2>/dev/null || break
    sleep 0.1
  done
  if kill -0 "$pid" 2>/dev/null; then
    kill -KILL "$pid"
  fi
  rm -f "$pidfile"
  echo "stopped $name (pid $pid)"
}

stop() {
  stop_one "$dir/devbroker.pid" devbroker
  stop_one "$dir/redis.pid" redis-server
}

status() {
  local rc=0
  for svc in redis:redis-server devbroker:devbroker; do
    local file=${svc%%:*} name=${svc#*:}
    if alive "$dir/$file.pid" "$name"; then
      echo "$name running (pid $(<"$dir/$file.pid"))"
    else
      echo "$name not running"
      rc=1
    fi
  done
  return $rc
}

case "${1:-start}" in
  start) start ;;
  stop) stop ;;
  status) status ;;
  *) die "usage: $0 [start|stop|status]" ;;
esac
