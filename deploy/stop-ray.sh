#!/usr/bin/env bash
# Stop this machine's Ray node: every process of the Ray started with this machine's
# RAY_TEMP_DIR, and whatever those processes started (workers, agents).
#
#   stop-ray.sh [--env FILE] [--grace SECONDS] [--list]
#
# --list only prints the processes it would stop.
#
# SIGTERM first, SIGKILL after the grace period (default 10s). On a machine that runs nothing
# but this one Ray this is what `ray stop --force` does, but `ray stop` finds Ray's processes
# by name across the whole machine, so it would also stop any other Ray there (another
# user's, or a second node started with another temp dir); this script stops only the Ray
# whose processes name this temp dir. Under systemd, prefer `systemctl stop
# rungway-ray-head` / `rungway-ray-worker`, which stops the unit's processes the same way.
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
# shellcheck source=common.sh
. "$here/common.sh"

rungway_parse_args "$@"
grace=10
list_only=0
set -- "${REST_ARGS[@]+"${REST_ARGS[@]}"}"
while [ $# -gt 0 ]; do
    case "$1" in
        --grace) [ $# -ge 2 ] || rungway_die "--grace needs a number of seconds"; grace="$2"; shift 2 ;;
        --list) list_only=1; shift ;;
        *) rungway_die "unknown argument $1 (usage: stop-ray.sh [--env FILE] [--grace SECONDS] [--list])" ;;
    esac
done
case "$grace" in ''|*[!0-9]*) rungway_die "--grace takes whole seconds, not $grace" ;; esac
rungway_load_env "$ENV_FILE_ARG"
rungway_require RAY_TEMP_DIR
temp_dir="$(realpath -m "$RAY_TEMP_DIR")"
[ "$temp_dir" != "/" ] || rungway_die "RAY_TEMP_DIR=/ cannot name one Ray"

# This machine's Ray processes: those that carry RUNGWAY_RAY_TEMP_DIR=<temp dir> in their
# environment (start-ray-head.sh and join-ray-worker.sh set it for `ray start`, and every Ray
# process inherits it, even the agents and workers that rename themselves and outlive a
# dead raylet), those that name the temp dir on their command line (gcs_server, raylet, the
# log monitor, also for a Ray started some other way), and all their descendants. Never this
# script, its children or its ancestors, and never a driver (run-search.sh): it does not
# carry the variable.
ray_pids() {
    local table pid ppid path grew=1
    local -A keep=() parent=() skip=() mine=()
    table="$(ps -eo pid=,ppid=)"
    while read -r pid ppid; do parent[$pid]=$ppid; done <<< "$table"
    pid=$$  # ancestors
    while [ -n "$pid" ] && [ "$pid" != 0 ] && [ -z "${skip[$pid]:-}" ]; do skip[$pid]=1; pid="${parent[$pid]:-}"; done
    while [ "$grew" = 1 ]; do  # descendants: subshells, grep, ps
        grew=0
        for pid in "${!parent[@]}"; do
            if [ -z "${skip[$pid]:-}" ] && [ -z "${mine[$pid]:-}" ] \
                && { [ "${parent[$pid]}" = "$$" ] || [ -n "${mine[${parent[$pid]}]:-}" ]; }; then
                mine[$pid]=1; grew=1
            fi
        done
    done
    for pid in "${!mine[@]}"; do skip[$pid]=1; done
    skip[$BASHPID]=1
    for path in $( { grep -lzxF -e "RUNGWAY_RAY_TEMP_DIR=$temp_dir" /proc/[0-9]*/environ
                     grep -lzF -e "=$temp_dir/" -e "$temp_dir/session_" /proc/[0-9]*/cmdline; } 2>/dev/null ); do
        pid="${path#/proc/}"; pid="${pid%%/*}"
        [ -z "${parent[$pid]:-}" ] || keep[$pid]=1  # grep itself (not in the table) matches too
    done
    grew=1
    while [ "$grew" = 1 ]; do
        grew=0
        for pid in "${!parent[@]}"; do
            if [ -z "${keep[$pid]:-}" ] && [ -n "${keep[${parent[$pid]}]:-}" ]; then keep[$pid]=1; grew=1; fi
        done
    done
    for pid in "${!keep[@]}"; do
        [ -n "${skip[$pid]:-}" ] || [ ! -d "/proc/$pid" ] || echo "$pid"
    done
}

alive() {  # running, not a zombie waiting for its parent
    local state
    state="$(awk '/^State:/ {print $2; exit}' "/proc/$1/status" 2>/dev/null || true)"
    [ -n "$state" ] && [ "$state" != Z ] && [ "$state" != X ]
}

pids="$(ray_pids)"
if [ -z "$pids" ]; then
    rungway_say "no Ray running with temp dir $temp_dir"
    exit 0
fi
if [ "$list_only" = 1 ]; then
    # shellcheck disable=SC2086
    ps -o pid=,ppid=,args= -p "$(echo $pids | tr ' ' ',')" | cut -c1-200
    exit 0
fi
count=$(wc -w <<< "$pids")
# shellcheck disable=SC2086
kill -TERM $pids 2>/dev/null || true
deadline=$(( $(date +%s) + grace ))
while [ "$(date +%s)" -lt "$deadline" ]; do
    left=""
    for pid in $pids; do
        alive "$pid" && left="$left $pid"
    done
    [ -n "$left" ] || break
    sleep 0.2
done
# What is still there of the first lot (a worker whose raylet died is no longer its child),
# and anything this Ray started meanwhile.
left=""
# shellcheck disable=SC2046,SC2086  # pid lists, split on purpose
for pid in $(printf '%s\n' $pids $(ray_pids) | sort -un); do
    alive "$pid" && left="$left $pid"
done
if [ -n "$left" ]; then
    # shellcheck disable=SC2086
    kill -KILL $left 2>/dev/null || true
    for _ in $(seq 50); do
        still=""
        for pid in $left; do alive "$pid" && still="$still $pid"; done
        [ -n "$still" ] || break
        sleep 0.1
    done
    [ -z "$still" ] || rungway_die "processes$still would not die"
    rungway_say "stopped $count Ray processes with temp dir $temp_dir ($(wc -w <<< "$left") needed SIGKILL)"
else
    rungway_say "stopped $count Ray processes with temp dir $temp_dir"
fi
