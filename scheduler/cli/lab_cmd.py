"""``rungway head`` (run the lab's head) and ``rungway lab ACTION`` (talk to it).

``rungway lab`` actions: submit, list, show, pause, resume, cancel, usage, whoami (each one
request to the head, through :class:`~rungway.scheduler.service.client.LabClient`), and token
(makes a new token and its hash for the lab config; needs no head). Common options:
``--head URL`` (default ``$RUNGWAY_HEAD`` or http://127.0.0.1:8470), ``--token-file PATH``
(default ``$RUNGWAY_TOKEN``, then ``$RUNGWAY_TOKEN_FILE``), ``--json``.

Exit status: 0 done; 2 the head refused the request (4xx: the message says why) or the input
here is wrong (no token, an unreadable spec file); 1 the head could not be reached, or failed.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from rungway.scheduler.core.errors import SpecError

__all__ = ["add_parsers", "run_head", "run_lab"]

EXIT_USER_ERROR = 2
EXIT_NO_HEAD = 1
HOW_TO_START = ("start one with `rungway head --config lab.toml`, "
                "or point --head (or $RUNGWAY_HEAD) at the one that runs")


def add_parsers(sub: Any) -> None:
    """Add ``head`` and ``lab`` to the ``rungway`` command's subparsers."""
    head = sub.add_parser("head", help="run the lab's head: many teams' searches on one Ray cluster, behind an HTTP API")
    head.add_argument("--config", required=True, help="the lab config (TOML): teams, quotas, token hashes, where to listen")

    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--head", dest="head_url", metavar="URL", help="the head's URL (default: $RUNGWAY_HEAD or http://127.0.0.1:8470)")
    common.add_argument("--token-file", metavar="PATH", help="file holding your token (default: $RUNGWAY_TOKEN, then $RUNGWAY_TOKEN_FILE)")
    common.add_argument("--json", action="store_true", help="print the head's answer as JSON")

    lab = sub.add_parser("lab", help="submit, list and steer searches on the lab's head")
    actions = lab.add_subparsers(dest="action", required=True, metavar="ACTION")
    submit = actions.add_parser("submit", parents=[common], help="submit a search for your team")
    submit.add_argument("spec", help="the search's spec file (TOML)")
    submit.add_argument("--priority", type=int, default=0, help="order among your team's searches; higher first (-1000 to 1000)")
    submit.add_argument("--team", help="the team to submit for (admins only)")
    listing = actions.add_parser("list", parents=[common], help="your team's searches (an admin: every team's)")
    listing.add_argument("--team", help="only this team's (admins; a team may name only itself)")
    for verb, words in (("show", "state, leaderboard and rungs of a search"), ("pause", "pause a search"),
                        ("resume", "resume a paused search"), ("cancel", "cancel a search for good")):
        actions.add_parser(verb, parents=[common], help=words).add_argument("name")
    usage = actions.add_parser("usage", parents=[common], help="CPU-hours used against each team's allowance")
    usage.add_argument("--period", choices=["day", "week", "month", "all"],
                       help="default: the lab's allowance period (head.allowance_period)")
    usage.add_argument("--since", type=float, metavar="UNIX_TIME", help="count from this time instead of the period's start")
    usage.add_argument("--until", type=float, metavar="UNIX_TIME", help="count up to this time (default: now)")
    usage.add_argument("--team", help="only this team (admins)")
    actions.add_parser("whoami", parents=[common], help="who your token belongs to")
    token = actions.add_parser("token", help="make a new token and the hash line for the lab config (needs no head)")
    token.add_argument("--json", action="store_true")


def run_head(args: argparse.Namespace) -> int:
    from rungway.scheduler.service.serve import serve

    return serve(args.config)


def run_lab(args: argparse.Namespace) -> int:
    if args.action == "token":
        return _token(args)
    from rungway.scheduler.service.client import HeadUnreachable, LabClient, LabClientError

    try:
        client = LabClient(args.head_url, token_file=args.token_file)
        answer = _ask(client, args)
    except HeadUnreachable as exc:
        print(f"error: {exc.detail}; {HOW_TO_START}", file=sys.stderr)
        return EXIT_NO_HEAD
    except LabClientError as exc:
        print(f"error: {exc.detail}", file=sys.stderr)
        if exc.status is not None and exc.status >= 500:
            return EXIT_NO_HEAD
        return EXIT_USER_ERROR
    except OSError as exc:  # the spec file
        print(f"error: cannot read the spec file {args.spec}: {exc.strerror}", file=sys.stderr)
        return EXIT_USER_ERROR
    except SpecError as exc:  # the spec file is not text
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    if args.json:
        print(json.dumps(answer, indent=2))
    else:
        _SHOW[args.action](answer)
    return 0


def _spec_text(path: str) -> str:
    from rungway.scheduler.spec import decode_spec

    return decode_spec(Path(path).read_bytes(), path)


def _ask(client: Any, args: argparse.Namespace) -> Any:
    action = args.action
    if action == "submit":
        return client.submit(_spec_text(args.spec), priority=args.priority, team=args.team)
    if action == "list":
        return client.searches(team=args.team)
    if action == "show":
        return client.search(args.name)
    if action in ("pause", "resume", "cancel"):
        return getattr(client, action)(args.name)
    if action == "usage":
        return client.usage(args.period, since=args.since, until=args.until, team=args.team)
    return client.whoami()


def _token(args: argparse.Namespace) -> int:
    from rungway.scheduler.service.auth import hash_token, new_token

    token = new_token()
    stored = hash_token(token)
    if args.json:
        print(json.dumps({"token": token, "hash": stored}))
        return 0
    print(f"token: {token}")
    print("  give it to its holder (e.g. in a file they name with --token-file); it is not shown again")
    print("for the lab config, in the team's (or admin's) table:")
    print(f'  tokens = ["{stored}"]')
    return 0


# ---- human output ---------------------------------------------------------------------------


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> None:
    cells = [[str(h) for h in headers], *[["-" if v is None else str(v) for v in row] for row in rows]]
    widths = [max(len(row[i]) for row in cells) for i in range(len(headers))]
    for row in cells:
        print("  ".join(value.ljust(width) for value, width in zip(row, widths)).rstrip())


def _num(value: float | None, digits: int = 2) -> str | None:
    if value is None:
        return None
    if 0 < abs(value) < 10 ** -digits:  # a small but real figure is not shown as 0
        return f"{value:.2g}"
    return f"{value:.{digits}f}"


def _best(search: dict[str, Any]) -> str | None:
    if search.get("leader_value") is None:
        return None
    return f"{search['leader_value']:.6g} (trial {search.get('leader')})"


def _state(search: dict[str, Any]) -> str:
    return search["state"] + (f" ({search['reason']})" if search.get("reason") else "")


def _show_list(searches: list[dict[str, Any]]) -> None:
    if not searches:
        print("no searches")
        return
    _table(["NAME", "TEAM", "STATE", "PRIORITY", "TRIALS", "CPUS", "CPU-HOURS", "BEST"],
           [[s["name"], s["team"], _state(s), s["priority"], s["trials"], _num(s["cpus_busy"], 1),
             _num(s["cpu_seconds"] / 3600), _best(s)] for s in searches])


def _show_one(search: dict[str, Any]) -> None:
    print(f"{search['name']} ({search['team']}): {_state(search)}, priority {search['priority']}")
    print(f"  {search['metric']} ({search['better']} is better); best {_best(search) or 'none yet'}")
    print(f"  {search['trials']} trials, {search['segments']} segments ({search['running_segments']} running, "
          f"{search.get('queued_segments', 0)} queued), {search['cpus_busy']:g} CPUs busy")
    print(f"  CPU-hours: {_num(search['cpu_seconds'] / 3600)} used, "
          f"{_num(search.get('reserved_cpu_seconds', search['cpu_seconds']) / 3600)} reserved")
    board = search.get("leaderboard") or []
    if board:
        keys = list(dict.fromkeys(k for row in board for k in row))
        print()
        _table([k.upper() for k in keys], [[_cell(row.get(k)) for k in keys] for row in board])


def _cell(value: Any) -> Any:
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, (dict, list)):
        return json.dumps(value)
    return value


def _show_usage(report: dict[str, Any]) -> None:
    print(f"usage for the {report['period']} period" if report["period"] != "all" else "usage for all time")
    _table(["TEAM", "USED CPU-HOURS", "RESERVED", "ALLOWANCE", "GUARANTEE CPUS", "CAP CPUS", "RUNNING CPUS", "SEARCHES",
            "HELD"],
           [[t["team"], _num(t["used_cpu_hours"]), _num(t.get("reserved_cpu_hours", 0.0)), _num(t["allowance_cpu_hours"]),
             f"{t['guarantee_cpus']:g}",
             None if t["cap_cpus"] is None else f"{t['cap_cpus']:g}", f"{t['cpus_running']:g}", t["searches"],
             "yes" if t["held"] else "no"] for t in report["teams"]])
    if report["searches"]:
        print()
        _table(["TEAM", "SEARCH", "CPU-HOURS", "RESERVED", "SEGMENTS"],
               [[s["team"], s["search"], _num(s["cpu_hours"]), _num(s.get("reserved_cpu_hours", 0.0)), s["segments"]]
                for s in report["searches"]])


def _show_info(search: dict[str, Any]) -> None:
    print(f"{search['name']} ({search['team']}): {_state(search)}")


def _show_submitted(search: dict[str, Any]) -> None:
    print(f"submitted {search['name']} for team {search['team']} (priority {search['priority']}): {_state(search)}")


def _show_caller(caller: dict[str, Any]) -> None:
    print(f"{caller['name']} ({'admin' if caller['admin'] else 'team ' + str(caller['team'])})")


_SHOW = {"submit": _show_submitted, "list": _show_list, "show": _show_one, "pause": _show_info,
         "resume": _show_info, "cancel": _show_info, "usage": _show_usage, "whoami": _show_caller}
