"""`benchkit serve`: the library's web page (rank, part, compare, downloads) over HTTP.

Loopback and read-only by default. Benches may file parts, curves and whole runs (POST
/api/parts, /api/curves, /api/runs; `benchkit library add RUN_DIR --library http://...`) only when the server is given a write token (from a file or
$BENCHKIT_SERVE_TOKEN, never on the command line, where other users could read it), and
every write must carry it. Without a token there is no write route at all, on any address.
"""

from __future__ import annotations

import os
from pathlib import Path

from benchkit.errors import UserError

LOOPBACK = ("127.0.0.1", "::1", "localhost")
TOKEN_ENV = "BENCHKIT_SERVE_TOKEN"


def register(subparsers) -> None:
    from benchkit.commands.library import LIBRARY_HELP

    p = subparsers.add_parser(
        "serve", help="serve the library's web page (rank, compare, download) on this machine",
        description="Serve the library's web page: parts ranked by effective capacitance at a bias and "
                    "temperature, part pages with curves, bands, claims and verification reports, a "
                    "compare page, and downloads. Loopback and read-only unless told otherwise.")
    p.add_argument("--library", metavar="FILE|URL", default=None, help=LIBRARY_HELP)
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1, this machine only)")
    p.add_argument("--port", type=int, default=8750, help="TCP port (default 8750)")
    p.add_argument("--write-token-file", metavar="FILE",
                   help=f"enable the benches' write API with the token in FILE (or set ${TOKEN_ENV}); "
                        f"writes must send 'Authorization: Bearer TOKEN'")
    p.set_defaults(func=run)


def read_token_file(path: str, option: str) -> str:
    """A token from its file (one line; surrounding blanks dropped)."""
    try:
        token = Path(path).read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{option} {path}: unreadable ({getattr(exc, 'strerror', None) or exc})") from None
    if not token:
        raise UserError(f"{option} {path}: the file is empty")
    return token


def read_token(args) -> str | None:
    if args.write_token_file:
        return read_token_file(args.write_token_file, "--write-token-file")
    return os.environ.get(TOKEN_ENV) or None


def run(args) -> int:
    if not 0 < args.port < 65536:
        raise UserError(f"--port {args.port}: choose a port between 1 and 65535")
    token = read_token(args)
    from benchkit.web import create_app

    app = create_app(args.library, token=token)  # bad library or token: one line, before listening
    import uvicorn

    mode = "read and write (token)" if token else "read-only"
    where = "this machine only" if args.host in LOOPBACK else "the network"
    print(f"serving {app.state.library.where} {mode} on http://{args.host}:{args.port}/ ({where}); Ctrl-C stops")
    uvicorn.run(app, host=args.host, port=args.port, log_level="warning")
    return 0
