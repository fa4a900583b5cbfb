"""``lenslane serve LAB``: the lab's web page on loopback, or elsewhere only behind an access token.

On a loopback address (the default, 127.0.0.1) the page is for the person at
this machine. On any other address every request must carry the access token
set in the environment variable :data:`TOKEN_VARIABLE` (at least
:data:`MIN_TOKEN_LENGTH` characters); without one the server refuses to start.
"""
from __future__ import annotations

import ipaddress
import os
import sys
from pathlib import Path

from lenslane.lab.files import NotALabFolder, require_lab

TOKEN_VARIABLE = "LENSLANE_SERVE_TOKEN"
MIN_TOKEN_LENGTH = 16
DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8470


class ServeRefused(Exception):
    """The server will not start as asked (the message says why and what to do)."""


def is_loopback(host: str) -> bool:
    """Whether the address is the machine's own (127.0.0.0/8, ::1 or the name localhost)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def access_token(host: str, environ=os.environ) -> str | None:
    """The token the server requires: None on loopback; the environment's on any other address.

    Raises :class:`ServeRefused` when another address is asked for without a
    token of at least :data:`MIN_TOKEN_LENGTH` characters.
    """
    if is_loopback(host):
        return None
    token = environ.get(TOKEN_VARIABLE, "")
    if len(token) < MIN_TOKEN_LENGTH:
        raise ServeRefused(
            f"serving on {host}, which is not a loopback address, needs an access token: set {TOKEN_VARIABLE} to a "
            f"secret of at least {MIN_TOKEN_LENGTH} characters (for example `export {TOKEN_VARIABLE}=$(python3 -c "
            f"'import secrets; print(secrets.token_urlsafe(24))')`) and open the page once as /?token=<it>")
    return token


def serve(lab_root: Path, host: str = DEFAULT_HOST, port: int = DEFAULT_PORT) -> int:
    """Serve the lab's page until interrupted; prints the address it listens on (port 0: any free port)."""
    from waitress import create_server

    from lenslane.web.app import create_app

    lab_root = Path(lab_root)
    try:
        require_lab(lab_root)
    except NotALabFolder as exc:
        raise ServeRefused(str(exc)) from None
    token = access_token(host)
    app = create_app(lab_root, token=token, loopback=token is None)
    server = create_server(app, host=host, port=port, threads=4, clear_untrusted_proxy_headers=True)
    shown = f"[{host}]" if ":" in host else host
    print(f"lenslane: serving {lab_root} at http://{shown}:{server.effective_port}/"
          + ("" if token is None else f" (access token from {TOKEN_VARIABLE})"), flush=True)
    try:
        server.run()
    except KeyboardInterrupt:
        pass
    finally:
        server.close()
    print("lenslane: stopped serving", file=sys.stderr)
    return 0
