"""Map library errors to exit codes for every command; tracebacks only with -vv."""

from __future__ import annotations

import functools
import sys
import traceback

import click

from landcheck.errors import LandcheckError

from .options import EXIT_INTERNAL


def _caused_by_interrupt(exc: BaseException) -> bool:
    """True when a KeyboardInterrupt stands behind ``exc`` (its cause or context chain)."""
    seen = set()
    e: BaseException | None = exc
    while e is not None and id(e) not in seen:
        if isinstance(e, KeyboardInterrupt):
            return True
        seen.add(id(e))
        e = e.__cause__ or e.__context__
    return False


def handle_errors(fn):
    """Map library errors to exit codes; tracebacks only with -vv."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        ctx = click.get_current_context()
        try:
            return fn(*args, **kwargs)
        except LandcheckError as exc:
            click.echo(f"landcheck: error: {exc}", err=True)
            ctx.exit(exc.exit_code)
        except (click.exceptions.Exit, click.ClickException, click.Abort):
            raise
        except KeyboardInterrupt:
            click.echo("landcheck: interrupted; no partial outputs were kept.", err=True)
            ctx.exit(130)
        except Exception as exc:  # internal error: say so plainly
            if _caused_by_interrupt(exc):  # e.g. Ctrl-C inside a compiled module's import -> ImportError
                click.echo("landcheck: interrupted; no partial outputs were kept.", err=True)
                ctx.exit(130)
            verbosity = (ctx.find_root().obj or {}).get("verbosity", 0)
            click.echo(f"landcheck: internal error: {type(exc).__name__}: {exc}", err=True)
            if verbosity >= 2:
                traceback.print_exc(file=sys.stderr)
            else:
                click.echo(
                    "Run again with -vv for a traceback and include it in a bug report "
                    "with the output of `landcheck --show-versions`.",
                    err=True,
                )
            ctx.exit(EXIT_INTERNAL)

    return wrapper
