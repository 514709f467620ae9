"""``seawall console``: the moderators' console in the browser, and its accounts.

``seawall console serve`` runs the console (loopback, port 9320 by default);
``seawall console user add NAME --role admin`` makes an account, asking for
the password twice (or reading one line from standard input with
``--password-stdin``).  The web stack is imported only when a subcommand
runs, so the rest of the CLI starts as fast as before.
"""
from __future__ import annotations

import getpass
import json
import signal
import sys
import time

from model.errors import SeawallError
from ops.connection import add_connection_args, config_from_args, connect


def register(sub) -> None:
    parser = sub.add_parser("console", help="the moderators' console in the browser, and its accounts")
    inner = parser.add_subparsers(dest="console_command", metavar="ACTION", required=True)

    p = inner.add_parser("serve", help="run the console (loopback by default)")
    p.add_argument("--host", default=None, help="bind address (default console.host, 127.0.0.1)")
    p.add_argument("--port", type=int, default=None, help="port (default console.port, 9320)")
    add_connection_args(p)
    p.set_defaults(func=run_serve)

    user = inner.add_parser("user", help="console accounts: add, list, remove, passwd, role")
    users = user.add_subparsers(dest="user_command", metavar="ACTION", required=True)
    p = users.add_parser("add", help="make an account; the password is asked for twice")
    p.add_argument("name")
    p.add_argument("--role", choices=("moderator", "admin"), default="moderator",
                   help="moderator (review queue, overview) or admin (also promote and roll back models)")
    p.add_argument("--password-stdin", action="store_true", help="read the password from one line of standard input")
    p.set_defaults(func=run_user_add)
    p = users.add_parser("passwd", help="set a new password; the account's sessions end")
    p.add_argument("name")
    p.add_argument("--password-stdin", action="store_true", help="read the password from one line of standard input")
    p.set_defaults(func=run_user_passwd)
    p = users.add_parser("role", help="change an account's role; its sessions end")
    p.add_argument("name")
    p.add_argument("role", choices=("moderator", "admin"))
    p.set_defaults(func=run_user_role)
    p = users.add_parser("remove", help="delete an account; its sessions end at once")
    p.add_argument("name")
    p.set_defaults(func=run_user_remove)
    p = users.add_parser("list", help="every account with its role")
    p.add_argument("--json", action="store_true", help="print JSON")
    p.set_defaults(func=run_user_list)
    for action in list(users.choices.values()):
        add_connection_args(action)

    p = inner.add_parser("audit", help="the newest entries of the audit stream (who did what)")
    p.add_argument("--count", type=int, default=50, help="entries to show (default 50)")
    p.add_argument("--json", action="store_true", help="print one JSON object per line")
    add_connection_args(p)
    p.set_defaults(func=run_audit)


def _accounts(args):
    from ops.console.accounts import Accounts

    config = config_from_args(args)
    client = connect(config)
    return Accounts(client=client, keys=config.keys, attempts=config.console.signin_attempts)


def read_password(args, *, stdin=None, prompt=None) -> str:
    """The new password: one line of standard input, or typed twice at a prompt."""
    from ops.console.accounts import check_password

    prompt = prompt or getpass.getpass
    if args.password_stdin:
        line = (stdin or sys.stdin).readline()
        return check_password(line.rstrip("\r\n"))
    first = prompt("password: ")
    check_password(first)
    if prompt("again: ") != first:
        raise SeawallError("console user: the two passwords differ; nothing changed")
    return first


def run_user_add(args) -> int:
    accounts = _accounts(args)
    from ops.console.accounts import check_name

    check_name(args.name)
    account = accounts.add(args.name, read_password(args), role=args.role, now=time.time())
    print(f"console user add: {account.name} ({account.role}) can now sign in")
    return 0


def run_user_passwd(args) -> int:
    accounts = _accounts(args)
    account = accounts.set_password(args.name, read_password(args))
    print(f"console user passwd: new password for {account.name}; its sessions have ended")
    return 0


def run_user_role(args) -> int:
    account = _accounts(args).set_role(args.name, args.role)
    print(f"console user role: {account.name} is now {account.role}; its sessions have ended")
    return 0


def run_user_remove(args) -> int:
    if not _accounts(args).remove(args.name):
        raise SeawallError(f"console user remove: no account {args.name!r}; see `seawall console user list`")
    print(f"console user remove: {args.name} removed; its sessions have ended")
    return 0


def run_user_list(args) -> int:
    rows = _accounts(args).list()
    if args.json:
        print(json.dumps([{"name": a.name, "role": a.role, "created_at": a.created_at} for a in rows]))
        return 0
    if not rows:
        print("console: no accounts yet; add one with `seawall console user add NAME --role admin`")
    for a in rows:
        print(f"{a.name:<24} {a.role:<10} since {time.strftime('%Y-%m-%d', time.gmtime(a.created_at))}")
    return 0


def run_audit(args) -> int:
    config = config_from_args(args)
    client = connect(config)
    entries = client.xrevrange(config.keys.audit, count=max(1, args.count))
    for sid, fields in reversed(entries):
        f = {k.decode(): v.decode("utf-8", "replace") for k, v in fields.items()}
        if args.json:
            print(json.dumps(dict(f, stream_id=sid.decode()), sort_keys=True))
            continue
        when = time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(float(f.pop("ts", 0) or 0)))
        event = f.pop("event", "?")
        who = f.pop("moderator", f.pop("name", ""))
        rest = " ".join(f"{k}={v}" for k, v in sorted(f.items()) if v)
        print(f"{when}  {event:<15} {who:<16} {rest}")
    return 0


def run_serve(args) -> int:
    config = config_from_args(args, {"console.host": args.host, "console.port": args.port})
    client = connect(config)
    client.ping()
    from ops.console.app import Console, serve

    console = Console(client=client, config=config)
    host, port = config.console.host, config.console.port
    if not console.accounts.list():
        print("console: there is no account yet; add one with `seawall console user add NAME --role admin`",
              file=sys.stderr)
    if host not in ("127.0.0.1", "localhost", "::1"):
        print(f"console: listening on {host}, not loopback; put it behind TLS and set console.secure_cookies",
              file=sys.stderr)

    def ready(_server):
        shown = f"[{host}]" if ":" in host else host
        print(f"console: http://{shown}:{port}/ (Ctrl-C stops it)", flush=True)

    # uvicorn shuts down gracefully on SIGINT or SIGTERM (pending decisions that are due get written), then
    # raises the signal again: either one then ends this command with status 0.
    signal.signal(signal.SIGTERM, _stop)
    try:
        serve(console, host=host, port=port, on_ready=ready)
    except KeyboardInterrupt:
        pass
    return 0


def _stop(signum, frame):
    raise SystemExit(0)
