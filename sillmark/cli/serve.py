"""``sillmark serve``: the browser app on this machine, or behind access secrets for others.
"""

from __future__ import annotations

import argparse
import signal
import sys

from sillmark import __version__
from sillmark.cli.common import EXIT_ERROR, EXIT_OK, PROG


def serve_refusal(args: argparse.Namespace) -> str | None:
    """Why ``sillmark serve`` with ``args`` must not start, or None: a host beyond this
    machine without an access secret, or unusable secrets (see sillmark.web.auth)."""
    from sillmark.web import auth
    from sillmark.web import config as web_config

    options = {"DATA_DIR": args.data} if args.data is not None else {}
    data_dir = web_config.data_dir_from({**web_config.DEFAULTS, **options})
    return auth.serving_refusal(args.host, web_config.instance_settings(data_dir, options))


def run_serve(args: argparse.Namespace) -> int:
    import waitress

    from sillmark.web import auth, create_app

    refusal = serve_refusal(args)
    if refusal is not None:
        print(f"{PROG}: error: {refusal}", file=sys.stderr, flush=True)
        return EXIT_ERROR
    options = {}
    if args.data is not None:
        options["DATA_DIR"] = args.data
    app = create_app(options or None)
    services = app.extensions["sillmark"]
    where = f"http://{'[' + args.host + ']' if ':' in args.host else args.host}:{args.port}/"
    print(f"Sillmark {__version__} serving at {where}", flush=True)
    print(f"Data folder: {services.data_dir}", flush=True)
    found = auth.secrets_in(app.config)
    if found:
        roles = "editors and viewers" if auth.VIEWER in found else "editors"
        print(f"Sign-in required ({roles}): {where}signin", flush=True)
    if not auth.is_loopback(args.host):
        print(f"{PROG}: warning: listening on {args.host}; other machines can reach this "
              "server (with the access secret); the connection is not encrypted, so put it "
              "behind an HTTPS proxy on an untrusted network", file=sys.stderr, flush=True)
    print("Press Ctrl-C to stop.", flush=True)
    # SIGTERM (a service manager's stop) ends the server as Ctrl-C does: its analysis
    # workers are stopped and their runs queued again for the next start.
    signal.signal(signal.SIGTERM, _exit_on_signal)
    try:
        waitress.serve(app, host=args.host, port=args.port, threads=args.threads,
                       ident="Sillmark", _quiet=True)
    finally:
        services.runner.stop()
    return EXIT_OK


def _exit_on_signal(signum, _frame) -> None:
    raise SystemExit(128 + signum)
