#!/usr/bin/env bash
# Run one search on the cluster, in the foreground, until it is done:
#
#   run-search.sh [--env FILE] SPEC [rungway run options, e.g. --json]
#
# runs `rungway run SPEC --address $RAY_HEAD_ADDRESS --store $RUNGWAY_STORE`. This process is
# the search's head (it decides what runs where and writes the search's state to the store);
# run it on a machine of the cluster, normally the Ray head. Running the same command again
# resumes a search that was stopped (Ctrl-C, a reboot, a lost machine) from the store.
# deploy/systemd/rungway-search@.service runs it for /etc/rungway/searches/NAME.toml; the
# lab's multi-team head is a separate unit, rungway-head.service (docs/service.md).
#
# Exit status is rungway's: 0 done, 2 a mistake in the spec, 3 paused on a storage fault,
# 130 stopped by Ctrl-C (SIGINT).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
# shellcheck source=common.sh
. "$here/common.sh"

rungway_parse_args "$@"
[ "$BACKGROUND" = 0 ] || rungway_die "run-search.sh runs in the foreground (use systemd or nohup to detach it)"
[ ${#REST_ARGS[@]} -ge 1 ] || rungway_die "usage: run-search.sh [--env FILE] SPEC [rungway run options]"
rungway_load_env "$ENV_FILE_ARG"
rungway_require RAY_HEAD_ADDRESS RUNGWAY_STORE
rungway_check_token
spec="${REST_ARGS[0]}"
[ -r "$spec" ] || rungway_die "cannot read the spec file $spec"
[ -x "$RUNGWAY_BIN/rungway" ] || rungway_die "no rungway at $RUNGWAY_BIN/rungway"

exec "$RUNGWAY_BIN/rungway" run "$spec" --address "$RAY_HEAD_ADDRESS" --store "$RUNGWAY_STORE" "${REST_ARGS[@]:1}"
