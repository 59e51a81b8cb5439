"""The ``geosr`` click group, its error policy, and the ``rio geosr`` plugin.

Error policy (the same under ``geosr`` and under ``rio geosr``):

- every :class:`geosr.errors.GeosrError` becomes one line
  ``geosr: error: <message>`` on stderr and exits with its ``exit_code``
  (2 for usage, 1 for data or a failed run);
- click's usage errors (a missing option, a bad value) are one line too,
  exit 2;
- any other exception is one line, exit 1, unless the group flag
  ``--debug`` (or ``GEOSR_DEBUG=1``) asks for the traceback;
- an interruption (Ctrl-C) is one line, exit 130; SIGTERM, exit 143.

Warnings from the library are printed as one line ``geosr: warning: ...``.
"""

from __future__ import annotations

import contextlib
import logging
import signal
import sys
import warnings

import click

from .._version import __version__
from . import assess, demo, describe, magnify, train

__all__ = ["geosr", "rio_geosr", "main", "CliError"]

PREFIX = "geosr"


def _one_line(text):
    return " ".join(str(text).split()) or "(no message)"


class CliError(click.ClickException):
    """A failure already phrased for the user: shown as one line on stderr."""

    def __init__(self, message, exit_code=1):
        super().__init__(_one_line(message))
        self.exit_code = exit_code

    def show(self, file=None):
        click.echo(f"{PREFIX}: error: {self.message}", err=True, file=file)


class Terminated(KeyboardInterrupt):
    """Raised in the main thread when the process receives SIGTERM.

    A KeyboardInterrupt, so that the library's clean-up for Ctrl-C (no
    destination, no temporary file left) runs for SIGTERM too.
    """


def _usage_message(exc):
    message = exc.format_message()
    ctx = getattr(exc, "ctx", None)
    if ctx is not None:
        message = f"{message.rstrip('.')}. Try '{ctx.command_path} --help'."
    return message


def _debug_requested(ctx):
    root = ctx
    while root is not None:
        if root.meta.get("geosr.debug"):
            return True
        root = root.parent
    return False


def _show_warning(message, category, filename, lineno, file=None, line=None):
    click.echo(f"{PREFIX}: warning: {_one_line(message)}", err=True)


def _quiet_library_logs():
    """Keep library log records off stderr: only geosr's own lines go there.

    rasterio relays GDAL's errors and warnings as log records; without a
    handler Python's last-resort handler prints them as bare lines next to
    the one error line, and what they say reaches the user through that
    error anyway.
    """
    logger = logging.getLogger("rasterio")
    if not any(isinstance(h, logging.NullHandler) for h in logger.handlers):
        logger.addHandler(logging.NullHandler())
    # dask.distributed's client logs a warning for every task it reschedules
    # (after a worker died, say); the run retries them and reports a failure
    # itself as one line. A filter, because distributed sets its loggers'
    # levels when it is imported.
    client = logging.getLogger("distributed.client")
    if not any(isinstance(f, _BelowError) for f in client.filters):
        client.addFilter(_BelowError())


class _BelowError(logging.Filter):
    """Drops records below ERROR."""

    def filter(self, record):
        return record.levelno >= logging.ERROR


@contextlib.contextmanager
def _error_policy(ctx=None):
    """Turn every failure raised inside into a one-line :class:`CliError`."""
    _quiet_library_logs()
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _show_warning
            yield
    except (click.exceptions.Exit, click.exceptions.NoArgsIsHelpError, CliError):
        raise
    except click.exceptions.Abort:
        raise CliError("interrupted", 130) from None
    except click.UsageError as exc:
        raise CliError(_usage_message(exc), 2) from None
    except click.ClickException as exc:
        raise CliError(exc.format_message(), exc.exit_code) from None
    except Terminated:
        raise CliError("terminated", 143) from None
    except KeyboardInterrupt:
        raise CliError("interrupted", 130) from None
    except Exception as exc:
        from ..errors import GeosrError

        if ctx is not None and _debug_requested(ctx):
            raise
        if isinstance(exc, GeosrError):
            raise CliError(str(exc), exc.exit_code) from None
        if isinstance(exc, MemoryError):
            raise CliError("out of memory; try a smaller --chunk", 1) from None
        text = str(exc)
        detail = f"{type(exc).__name__}: {text}" if text else type(exc).__name__
        raise CliError(f"{detail} (rerun with --debug for the traceback)", 1) from None


class GeosrGroup(click.Group):
    """A click group that applies the geosr error policy to its subcommands."""

    def make_context(self, info_name, args, parent=None, **extra):
        with _error_policy(None):
            return super().make_context(info_name, args, parent=parent, **extra)

    def invoke(self, ctx):
        with _error_policy(ctx), _sigterm_as_terminated():
            return super().invoke(ctx)


def _debug_callback(ctx, param, value):
    if value:
        ctx.meta["geosr.debug"] = True
    return value


_HELP = """Magnify georeferenced rasters with coupled sparse dictionaries.

The fine detail geosr adds is synthesized by a statistical model, not
measured: do not use it for measuring distances or areas, boundaries,
evidence or safety-critical decisions.
"""


def _make_group(name, help_text):
    @click.group(name=name, cls=GeosrGroup, help=help_text,
                 context_settings={"help_option_names": ["-h", "--help"]})
    @click.option(
        "--debug",
        is_flag=True,
        envvar="GEOSR_DEBUG",
        is_eager=True,
        expose_value=False,
        callback=_debug_callback,
        help="Show the full traceback of an error.",
    )
    @click.version_option(__version__, "--version", prog_name="geosr",
                          message="%(prog)s %(version)s")
    def group():
        pass

    for command in (train.train, magnify.magnify, assess.assess, describe.describe, demo.demo):
        group.add_command(command)
    return group


#: The ``geosr`` command.
geosr = _make_group("geosr", _HELP)

#: The same commands as a plugin of rasterio's ``rio`` (``rio geosr ...``).
rio_geosr = _make_group("geosr", _HELP + "\nThis is geosr as a plugin of rasterio's rio command.")


def _on_sigterm(signum, frame):
    raise Terminated("terminated by SIGTERM")


@contextlib.contextmanager
def _sigterm_as_terminated():
    """Turn SIGTERM into :class:`Terminated` while a subcommand runs.

    The one SIGTERM handler of geosr: installed around every subcommand, of
    ``geosr`` and of ``rio geosr`` alike, so the library's clean-up for
    Ctrl-C (no destination, no temporary file left) runs for SIGTERM too and
    the run ends with exit code 143. Does nothing outside the main thread.
    """
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except (ValueError, OSError):  # not in the main thread
        previous = None
    try:
        yield
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def main(argv=None):
    """Entry point of the ``geosr`` console script."""
    geosr.main(args=argv, prog_name="geosr")


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
