# shellcheck shell=bash
# Sourced by the deploy scripts (not run on its own): reads this machine's settings file,
# checks it, and prepares the environment every Ray process and driver on this machine needs.
#
# The settings file is /etc/rungway/rungway.env, or the file named by --env FILE or by
# $RUNGWAY_ENV_FILE. It is plain KEY=value lines, read both by these scripts and by systemd's
# EnvironmentFile=, so it holds no shell expansions and no `export`.

rungway_die() {
    echo "${0##*/}: $*" >&2
    exit 2
}

rungway_say() {
    echo "${0##*/}: $*" >&2
}

# rungway_load_env FILE: read the settings and fill in defaults.
rungway_load_env() {
    local file="$1"
    [ -n "$file" ] || file="${RUNGWAY_ENV_FILE:-/etc/rungway/rungway.env}"
    [ -r "$file" ] || rungway_die "cannot read the settings file $file (copy deploy/rungway.env.example there and edit it, or pass --env FILE)"
    set -a
    # shellcheck disable=SC1090
    . "$file"
    set +a
    RUNGWAY_ENV_FILE="$file"
    export RUNGWAY_ENV_FILE

    # Ray's token authentication stays on: every ray process and every driver needs it.
    case "${RAY_AUTH_MODE:-token}" in
        token) ;;
        *) rungway_die "RAY_AUTH_MODE=${RAY_AUTH_MODE} in $file: these scripts run Ray only with RAY_AUTH_MODE=token" ;;
    esac
    export RAY_AUTH_MODE=token
    : "${RAY_AUTH_TOKEN_PATH:=/etc/rungway/ray-auth-token}"
    export RAY_AUTH_TOKEN_PATH

    : "${RAY_PORT:=6379}"
    : "${RAY_NODE_MANAGER_PORT:=6380}"
    : "${RAY_OBJECT_MANAGER_PORT:=6381}"
    : "${RAY_RUNTIME_ENV_AGENT_PORT:=6382}"
    : "${RAY_DASHBOARD_AGENT_GRPC_PORT:=6383}"
    : "${RAY_DASHBOARD_AGENT_LISTEN_PORT:=6384}"
    : "${RAY_METRICS_EXPORT_PORT:=6385}"
    : "${RAY_CLIENT_SERVER_PORT:=10001}"
    : "${RAY_MIN_WORKER_PORT:=10002}"
    : "${RAY_MAX_WORKER_PORT:=10999}"
    : "${RAY_TEMP_DIR:=/var/lib/rungway/ray}"
    : "${RAY_JOIN_TIMEOUT:=300}"

    if [ -n "${RUNGWAY_VENV:-}" ]; then
        RUNGWAY_BIN="$RUNGWAY_VENV/bin"
    elif [ -n "${RUNGWAY_PYTHON:-}" ]; then
        RUNGWAY_BIN="$(dirname "$RUNGWAY_PYTHON")"
    else
        rungway_die "set RUNGWAY_VENV (the virtual environment rungway is installed in, the same path on every machine) in $file"
    fi
    RAY_BIN="$RUNGWAY_BIN/ray"
    [ -x "$RAY_BIN" ] || rungway_die "no ray at $RAY_BIN: install rungway into $RUNGWAY_BIN/.. on this machine (see deploy/README.md)"

    # Objective code must import on every worker: Ray's worker processes inherit this
    # environment from the raylet that `ray start` leaves running.
    if [ -n "${RUNGWAY_PYTHONPATH:-}" ]; then
        PYTHONPATH="$RUNGWAY_PYTHONPATH${PYTHONPATH:+:$PYTHONPATH}"
        export PYTHONPATH
    fi
    # The name this machine goes by in the measurements' `node` column.
    if [ -n "${RUNGWAY_NODE:-}" ]; then
        export RUNGWAY_NODE
    fi
    # Ray reads RAY_ADDRESS on its own; these scripts always pass the address explicitly.
    unset RAY_ADDRESS
}

rungway_require() {
    local name
    for name in "$@"; do
        [ -n "${!name:-}" ] || rungway_die "$name is not set in $RUNGWAY_ENV_FILE"
    done
}

rungway_check_token() {
    if [ ! -s "$RAY_AUTH_TOKEN_PATH" ] || [ ! -r "$RAY_AUTH_TOKEN_PATH" ]; then
        rungway_die "no readable Ray token at RAY_AUTH_TOKEN_PATH=$RAY_AUTH_TOKEN_PATH (make one on the head and copy it to every machine: see deploy/README.md)"
    fi
    local mode
    mode="$(stat -c %a "$RAY_AUTH_TOKEN_PATH" 2>/dev/null || echo 600)"
    case "$mode" in
        *00) ;;
        *) rungway_say "warning: $RAY_AUTH_TOKEN_PATH is readable by others (mode $mode); chmod 600 it" ;;
    esac
}

# The arguments every `ray start` on this machine gets: address, pinned ports (deploy/firewall.nft
# opens exactly these), temp dir, CPUs, no dashboard, no usage reporting.
rungway_ray_node_args() {
    # Every process of this Ray inherits this; stop-ray.sh finds them by it.
    RUNGWAY_RAY_TEMP_DIR="$(realpath -m "$RAY_TEMP_DIR")"
    export RUNGWAY_RAY_TEMP_DIR
    RAY_NODE_ARGS=(
        --node-ip-address "$NODE_IP"
        --temp-dir "$RAY_TEMP_DIR"
        --node-manager-port "$RAY_NODE_MANAGER_PORT"
        --object-manager-port "$RAY_OBJECT_MANAGER_PORT"
        --runtime-env-agent-port "$RAY_RUNTIME_ENV_AGENT_PORT"
        --dashboard-agent-grpc-port "$RAY_DASHBOARD_AGENT_GRPC_PORT"
        --dashboard-agent-listen-port "$RAY_DASHBOARD_AGENT_LISTEN_PORT"
        --metrics-export-port "$RAY_METRICS_EXPORT_PORT"
        --min-worker-port "$RAY_MIN_WORKER_PORT"
        --max-worker-port "$RAY_MAX_WORKER_PORT"
        --disable-usage-stats
    )
    case "${CPUS:-}" in
        ""|auto) ;;
        *) RAY_NODE_ARGS+=(--num-cpus "$CPUS") ;;
    esac
    if [ -n "${RAY_OBJECT_STORE_MEMORY:-}" ]; then
        RAY_NODE_ARGS+=(--object-store-memory "$RAY_OBJECT_STORE_MEMORY")
    fi
}

# rungway_parse_args "$@": --env FILE and --background; anything else is left in REST_ARGS.
# shellcheck disable=SC2034  # ENV_FILE_ARG, BACKGROUND and REST_ARGS are read by the scripts
rungway_parse_args() {
    ENV_FILE_ARG=""
    BACKGROUND=0
    REST_ARGS=()
    while [ $# -gt 0 ]; do
        case "$1" in
            --env) [ $# -ge 2 ] || rungway_die "--env needs a file"; ENV_FILE_ARG="$2"; shift 2 ;;
            --env=*) ENV_FILE_ARG="${1#--env=}"; shift ;;
            --background) BACKGROUND=1; shift ;;
            *) REST_ARGS+=("$1"); shift ;;
        esac
    done
}
