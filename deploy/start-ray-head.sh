#!/usr/bin/env bash
# Start this machine's Ray head node (the GCS and this machine's raylet).
#
#   start-ray-head.sh [--env FILE] [--background]
#
# Without --background it runs in the foreground until Ray stops (how systemd runs it:
# deploy/systemd/rungway-ray-head.service). With --background it returns once the head is up,
# leaving Ray running; deploy/stop-ray.sh stops it.
#
# Settings come from /etc/rungway/rungway.env (or --env FILE): NODE_IP, RAY_PORT, RAY_TEMP_DIR,
# CPUS, RAY_AUTH_TOKEN_PATH, RUNGWAY_VENV and the pinned ports; see deploy/rungway.env.example.
# Ray's token authentication is always on (RAY_AUTH_MODE=token).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
# shellcheck source=common.sh
. "$here/common.sh"

rungway_parse_args "$@"
[ ${#REST_ARGS[@]} -eq 0 ] || rungway_die "unknown arguments: ${REST_ARGS[*]} (usage: start-ray-head.sh [--env FILE] [--background])"
rungway_load_env "$ENV_FILE_ARG"
rungway_require NODE_IP RAY_PORT RAY_TEMP_DIR
rungway_check_token
rungway_ray_node_args
mkdir -p "$RAY_TEMP_DIR"

args=(
    start --head
    --port "$RAY_PORT"
    --include-dashboard=false
    "${RAY_NODE_ARGS[@]}"
)
# The Ray Client server runs only where ray[client] is installed; pin its port when it does.
if "$RUNGWAY_BIN/python" -c "import grpc" >/dev/null 2>&1; then
    args+=(--ray-client-server-port "$RAY_CLIENT_SERVER_PORT")
fi
if [ "$BACKGROUND" = 1 ]; then
    "$RAY_BIN" "${args[@]}"
    rungway_say "Ray head is up at $NODE_IP:$RAY_PORT (temp dir $RAY_TEMP_DIR)"
else
    exec "$RAY_BIN" "${args[@]}" --block
fi
