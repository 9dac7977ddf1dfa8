# Shell functions for the scripts that need a Kafka broker: install tansu when it is missing,
# start it on a free loopback port, stop it again. Sourced, not run:
#
#   . "$(dirname "$0")/lib/broker.sh"
#   ensure_tansu
#   start_broker "$logfile"     # sets BROKER_PID and BROKER_ADDR (127.0.0.1:PORT)
#   stop_broker                 # from an exit trap; safe to call twice
#
# Every function logs through `log`, which the sourcing script defines.

# A free TCP port on the loopback interface.
free_port() {
  python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

# Puts tansu on PATH: the one on PATH, else one in ~/.cargo/bin, else waits for a `cargo install`
# already running (at most 40 minutes), else installs it (about 17 minutes on 2 cores).
ensure_tansu() {
  command -v tansu >/dev/null 2>&1 && return 0
  if [ ! -x "$HOME/.cargo/bin/tansu" ] && pgrep -f 'cargo install tansu' >/dev/null 2>&1; then
    log "another process is installing tansu; waiting for it (at most 40 minutes)"
    for _ in $(seq 1 480); do
      [ -x "$HOME/.cargo/bin/tansu" ] && break
      pgrep -f 'cargo install tansu' >/dev/null 2>&1 || break
      sleep 5
    done
  fi
  if [ ! -x "$HOME/.cargo/bin/tansu" ]; then
    log "installing the tansu broker (cargo install; about 17 minutes on 2 cores)"
    cargo install tansu --version 0.6.0 --locked --features dynostore
  fi
  PATH="$HOME/.cargo/bin:$PATH"
  export PATH
}

# Starts a tansu broker with in-memory storage on a free loopback port, its output in $1, and
# waits (at most 10 s) until it accepts connections. Sets BROKER_PID and BROKER_ADDR.
start_broker() {
  local logfile="$1" port
  port=$(free_port)
  tansu broker \
    --listener-url "tcp://127.0.0.1:$port" \
    --advertised-listener-url "tcp://127.0.0.1:$port" \
    --storage-engine memory://tansu/ >"$logfile" 2>&1 &
  BROKER_PID=$!
  BROKER_ADDR="127.0.0.1:$port"
  for _ in $(seq 1 100); do
    if (exec 3<>"/dev/tcp/127.0.0.1/$port") 2>/dev/null; then
      log "broker on $BROKER_ADDR (pid $BROKER_PID)"
      return 0
    fi
    if ! kill -0 "$BROKER_PID" 2>/dev/null; then
      log "the broker exited:"
      cat "$logfile" >&2
      return 1
    fi
    sleep 0.1
  done
  log "the broker does not listen on $BROKER_ADDR after 10 s"
  return 1
}

# Stops the broker start_broker started (if any) and waits for it to exit.
stop_broker() {
  if [ -n "${BROKER_PID:-}" ]; then
    kill "$BROKER_PID" 2>/dev/null || true
    wait "$BROKER_PID" 2>/dev/null || true
    BROKER_PID=
  fi
}
