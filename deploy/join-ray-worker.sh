#!/usr/bin/env bash
# Join this machine to the Ray cluster whose head is at $RAY_HEAD_ADDRESS.
#
#   join-ray-worker.sh [--env FILE] [--background]
#
# Waits for the head to answer (up to $RAY_JOIN_TIMEOUT seconds, default 300), then starts this
# machine's raylet. Without --background it stays in the foreground until Ray stops (how
# systemd runs it: deploy/systemd/rungway-ray-worker.service); with --background it returns
# once this node has joined. Uses the same token as the head (RAY_AUTH_TOKEN_PATH).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
# shellcheck source=common.sh
. "$here/common.sh"

rungway_parse_args "$@"
[ ${#REST_ARGS[@]} -eq 0 ] || rungway_die "unknown arguments: ${REST_ARGS[*]} (usage: join-ray-worker.sh [--env FILE] [--background])"
rungway_load_env "$ENV_FILE_ARG"
rungway_require RAY_HEAD_ADDRESS NODE_IP RAY_TEMP_DIR
rungway_check_token
rungway_ray_node_args
mkdir -p "$RAY_TEMP_DIR"

# Wait, bounded, until the head's GCS answers (each try itself waits up to about 40 s).
deadline=$(( $(date +%s) + RAY_JOIN_TIMEOUT ))
pause=1
until answer="$("$RAY_BIN" health-check --address "$RAY_HEAD_ADDRESS" 2>&1)"; do
    if grep -qi "authenticat" <<< "$answer"; then
        rungway_die "the Ray head at $RAY_HEAD_ADDRESS refused this machine's token ($RAY_AUTH_TOKEN_PATH): copy the head's token here"
    fi
    if [ "$(date +%s)" -ge "$deadline" ]; then
        rungway_die "the Ray head at $RAY_HEAD_ADDRESS did not answer within ${RAY_JOIN_TIMEOUT}s (is it up, and does its firewall let $NODE_IP in?)"
    fi
    rungway_say "waiting for the Ray head at $RAY_HEAD_ADDRESS ..."
    sleep "$pause"
    [ "$pause" -ge 10 ] || pause=$(( pause * 2 ))
done

args=(start --address "$RAY_HEAD_ADDRESS" "${RAY_NODE_ARGS[@]}")
if [ "$BACKGROUND" = 1 ]; then
    "$RAY_BIN" "${args[@]}"
    rungway_say "joined the Ray cluster at $RAY_HEAD_ADDRESS as $NODE_IP (temp dir $RAY_TEMP_DIR)"
else
    exec "$RAY_BIN" "${args[@]}" --block
fi
