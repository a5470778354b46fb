"""The ``ebullio`` command with the board: ``monitor``'s verbs plus ``board``, and the demo's board.

This is the installed entry point. ``monitor/cli.py`` holds every other verb; it
may not import the board (imports go dashboard -> monitor -> drivers), so the
board's verb and the demo's board are added here through its ``extend`` hook.
"""

from __future__ import annotations

import argparse
import asyncio
import base64
import hmac
import logging
import os
import sys
import threading

from drivers.errors import EbullioError
from monitor import cli

LOOPBACK = ("127.0.0.1", "localhost", "::1")


def serve_board(
    log_path: str | None, host: str, port: int, poll_ms: int = 2000, auth=None, more_logs=(),
    access_log: str | None = None, engine: list[str] | None = None,
):  # fmt: skip
    """Start the board over ``log_path`` in a thread; return the (werkzeug) server.

    With ``engine`` (NATS server URLs) and no log: the board over the NATS engine's
    estimates bucket (:func:`dashboard.app.create_engine_app`).

    ``auth`` is (user, password) for basic auth, or None; ``more_logs`` are offered in
    the replay view too. The web server's request lines go to the file ``access_log``,
    and nowhere without one (they buried the demo's live table). Raises EbullioError
    when the port cannot be had.
    """
    from werkzeug.serving import make_server

    requests = logging.getLogger("werkzeug")
    requests.propagate = False  # never onto the terminal
    if access_log is not None:
        handler = logging.FileHandler(access_log, encoding="utf-8")
        handler.setFormatter(logging.Formatter("%(asctime)s %(message)s"))
        requests.addHandler(handler)
        requests.setLevel(logging.INFO)
    else:
        requests.setLevel(logging.WARNING)  # errors still reach the handlers, if any

    from dashboard.app import create_app, create_engine_app

    if engine:
        app = create_engine_app(engine, poll_ms=poll_ms)
    else:
        assert log_path is not None
        app = create_app(log_path, poll_ms=poll_ms, more_logs=tuple(more_logs))
    if auth is not None:
        _require_login(app, *auth)
    try:
        server = make_server(host, port, app.server, threaded=True)
    except OSError as exc:
        raise EbullioError(
            f"the board cannot use {host}:{port} ({exc}); pick another port"
        ) from exc
    threading.Thread(target=server.serve_forever, name="ebullio-board", daemon=True).start()
    return server


def _require_login(app, user: str, password: str) -> None:
    """Refuse every request without the right basic-auth header."""
    from flask import Response, request

    expected = "Basic " + base64.b64encode(f"{user}:{password}".encode()).decode()

    @app.server.before_request
    def _check() -> Response | None:
        if hmac.compare_digest(request.headers.get("Authorization", ""), expected):
            return None
        return Response("login needed", 401, {"WWW-Authenticate": 'Basic realm="ebullio"'})


def _login_for(host: str, no_auth: bool) -> tuple[str, str] | None:
    """Return the login a host needs (None on loopback or with --no-auth); warn beyond it."""
    if host in LOOPBACK:
        return None
    print(f"ebullio board: warning: serving on {host} makes the board reachable from other "
          "machines", file=sys.stderr)  # fmt: skip
    if no_auth:
        return None
    user, password = os.environ.get("EBULLIO_BOARD_USER"), os.environ.get("EBULLIO_BOARD_PASSWORD")
    if not (user and password):
        raise EbullioError(
            "for a host other than loopback, set EBULLIO_BOARD_USER and "
            "EBULLIO_BOARD_PASSWORD (basic auth), or pass --no-auth on purpose"
        )
    return user, password


def cmd_board(args: argparse.Namespace) -> int:
    """Serve the board over a log (read-only) until Ctrl-C or SIGTERM."""
    engine = None
    if args.engine is not None:
        from monitor.engine.worker import engine_servers

        if args.log is not None:
            raise EbullioError("give a log or --engine, not both")
        engine = engine_servers(args.engine)
    elif args.log is None:
        raise EbullioError("give a log to show (or --engine nats://HOST:PORT)")
    auth = _login_for(args.host, args.no_auth)
    server = serve_board(args.log, args.host, args.port, int(args.poll_s * 1000), auth,
                         more_logs=args.more, access_log=args.access_log,
                         engine=engine)  # fmt: skip
    shown = args.log if engine is None else "the engine at " + ",".join(engine)
    print(f"ebullio board: http://{args.host}:{server.server_port}/ over {shown} "
          "(Ctrl-C stops it)", file=sys.stderr, flush=True)  # fmt: skip
    try:
        asyncio.run(until_signalled())
    finally:
        server.shutdown()
    return 0


async def until_signalled() -> None:
    """Return on SIGINT or SIGTERM."""
    import signal

    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for signum in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(signum, stop.set)
    try:
        await stop.wait()
    finally:
        for signum in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(signum)


def cmd_demo_with_board(args: argparse.Namespace) -> int:
    """Run the demo with the board over its log; the board stays up until Ctrl-C."""
    if args.no_board:
        return cli.cmd_demo(args)
    servers: list = []

    def start() -> None:
        servers.append(serve_board(args.out, "127.0.0.1", args.board_port,
                                   access_log=args.access_log))  # fmt: skip
        print(f"demo: the board is at http://127.0.0.1:{servers[0].server_port}/", flush=True)

    async def after() -> None:
        print(f"demo: the board stays up at http://127.0.0.1:{servers[0].server_port}/; "
              "Ctrl-C stops it", flush=True)  # fmt: skip
        await until_signalled()

    args.on_started, args.after_demo = start, after
    try:
        return cli.cmd_demo(args)
    finally:
        for server in servers:
            server.shutdown()


def extend(verbs, parsers) -> None:
    """Add ``board`` and the demo's board options to the ``ebullio`` parser."""
    demo = parsers["demo"]
    demo.add_argument(
        "--board-port", type=cli.port_option, default=8050, help="board port (default 8050)"
    )
    demo.add_argument("--no-board", action="store_true", help="run without the web board")
    demo.add_argument("--access-log", metavar="FILE",
                      help="write the board's web requests here (default: not kept)")  # fmt: skip
    demo.set_defaults(func=cmd_demo_with_board)
    brd = verbs.add_parser(
        "board",
        help="serve the web board over a log",
        description="Serve the board over a recorder log that 'ebullio run' may still be "
        "writing (read-only; new data appears by itself), or over a recorded SQLite or CSV "
        "log. It binds to 127.0.0.1 by default. Another host needs EBULLIO_BOARD_USER and "
        "EBULLIO_BOARD_PASSWORD (basic auth), or --no-auth on purpose.",
        epilog="examples: ebullio board out/demo.sqlite --port 8050; "
        "ebullio board --engine nats://127.0.0.1:4222",
    )
    brd.add_argument("log", metavar="LOG", nargs="?", help="recorder (SQLite) or CSV log")
    brd.add_argument("more", metavar="MORE", nargs="*",
                     help="further logs to offer in the replay view")  # fmt: skip
    brd.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    brd.add_argument("--port", type=cli.port_option, default=8050, help="port (default 8050)")
    brd.add_argument(
        "--poll-s",
        type=cli.number_option(0.1, 3600.0),
        default=2.0,
        help="refresh every N s (default 2)",
    )
    brd.add_argument("--no-auth", action="store_true", help="no login even beyond loopback")
    brd.add_argument(
        "--engine", metavar="NATS_URLS",
        help="instead of a log, show the NATS engine's fleet from its estimates bucket "
        "(nats://HOST:PORT, several comma-separated; docs/engine.md)",
    )  # fmt: skip
    brd.add_argument("--access-log", metavar="FILE",
                     help="write the web requests here (default: not kept)")  # fmt: skip
    brd.set_defaults(func=cmd_board)


def main(argv: list[str] | None = None) -> int:
    """Run the ``ebullio`` command, board included; return the exit code."""
    return cli.main(argv, extend=extend)


if __name__ == "__main__":
    raise SystemExit(main())
