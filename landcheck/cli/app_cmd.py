"""``landcheck app``: start the local browser app and print its address."""

from __future__ import annotations

import ipaddress
import socket

import click

from .errors import handle_errors
from .options import CAUTION_HELP


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@click.command(
    "app",
    help=f"""Start the local browser app: upload inputs, build the rulebook in a form,
run audits with live progress, explore and download the results (docs/app.md).

Projects, inputs, rulebook versions and runs are kept in the workspace
folder (a SQLite database beside the files). The app listens on 127.0.0.1
only, unless --host names another address together with --allow-remote.

{CAUTION_HELP}

\b
Examples:
  landcheck app
  landcheck app --workspace ~/landcheck-projects --port 8800
""",
)
@click.option(
    "--workspace",
    default="landcheck-workspace",
    show_default=True,
    type=click.Path(file_okay=False),
    help="Folder for projects and runs (created when missing).",
)
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option("--port", type=click.IntRange(0, 65535), default=8765, show_default=True, help="Port (0: any free port).")
@click.option(
    "--allow-remote",
    is_flag=True,
    help="Allow --host to be an address other machines can reach (the app has no log-in: anyone who reaches it can use it).",
)
@click.option(
    "--max-upload-mb",
    type=click.FloatRange(min=0.001),
    default=2048.0,
    show_default=True,
    help="Largest file one upload may be.",
)
@click.pass_context
@handle_errors
def command(ctx, workspace, host, port, allow_remote, max_upload_mb):
    import uvicorn

    from landcheck.app.server import create_app

    loopback = _is_loopback(host)
    if not loopback and not allow_remote:
        raise click.UsageError(
            f"--host {host} can be reached from other machines; add --allow-remote if that is what you want."
        )
    allowed = ["127.0.0.1", "localhost"] if loopback else ["*"]
    if host not in allowed and loopback:
        allowed.append(host)
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host, port))
    except OSError as exc:
        raise click.UsageError(f"cannot listen on {host}:{port} ({exc.strerror}); choose another --port.") from None
    sock.listen(64)
    bound = sock.getsockname()[1]
    app = create_app(workspace, max_upload_bytes=int(max_upload_mb * 1e6), allowed_hosts=allowed)
    shown = f"[{host}]" if ":" in host else host
    if not loopback:
        click.echo(
            f"WARNING: listening on {host}, reachable from other machines; the app has no log-in, so anyone who "
            "can reach this address can read and run your projects.",
            err=True,
        )
    click.echo(f"landcheck app: open http://{shown}:{bound}/ in your browser (workspace {app.state.workspace.root}).")
    click.echo(CAUTION_HELP)
    click.echo("Stop with Ctrl+C.", err=True)
    config = uvicorn.Config(app, log_level="warning", lifespan="on", timeout_graceful_shutdown=20)
    uvicorn.Server(config).run(sockets=[sock])
