"""The `skewfix` command line: a thin typer layer over the pipeline modules.

Every command lives in its own module here and registers itself on `app`.
`main()` turns every `SkewfixError` and every usage mistake into one line on
stderr and a non-zero exit status (1 for input and runtime problems, 2 for
usage), with no traceback unless ``--debug`` (anywhere on the command line)
or ``SKEWFIX_DEBUG=1``. A run stopped by Ctrl-C exits with 130, by SIGTERM
with 143, and leaves no partial output.
"""

from __future__ import annotations

import os
import signal
import sys

import typer

from skewfix.cli.options import flag
from skewfix.errors import SkewfixError, plain_media_error

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Measure and remove rolling-shutter skew in footage.",
)

# A run stopped by a signal exits with 128 + the signal's number, as the shell reports a
# process killed by it (POSIX shell "Exit Status"; common practice): 130 for SIGINT
# (Ctrl-C), 143 for SIGTERM (kill).
INTERRUPTED = 128 + signal.SIGINT
DEBUG_OPTION = "--debug"

_stopped_by = {"signal": signal.SIGINT}  # which signal stopped the run (SIGINT unless told otherwise)


@app.callback()
def _root(debug: bool = flag(DEBUG_OPTION, help="Show full tracebacks on errors "
                                                  "(anywhere on the command line).")):
    """Measure and remove rolling-shutter skew in footage."""
    # the option is read by `main` from the arguments, before any command runs


def fail(message: str, code: int = 1) -> None:
    typer.echo(f"skewfix: {message}", err=True)
    raise SystemExit(code)


def _on_terminate(signum, frame):  # SIGTERM behaves like Ctrl-C (partial output removed), exits 143
    _stopped_by["signal"] = signum
    raise KeyboardInterrupt


def split_debug(argv: list[str]) -> tuple[list[str], bool]:
    """``argv`` without ``--debug`` (wherever it stands before a ``--``), and whether it was there."""
    end = argv.index("--") if "--" in argv else len(argv)
    kept = [a for a in argv[:end] if a != DEBUG_OPTION] + argv[end:]
    return kept, len(kept) != len(argv)


def _register_commands():
    from skewfix.cli import fix as _fix  # noqa: F401
    from skewfix.cli import demo as _demo  # noqa: F401
    for name in ("measure", "reskew", "preview", "batch", "cameras"):
        try:
            __import__(f"skewfix.cli.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"skewfix.cli.{name}":
                raise


def _click_exceptions():
    """typer ships its own copy of click in recent releases; use whichever it runs on."""
    try:
        from typer._click import exceptions  # type: ignore[attr-defined]
    except ImportError:  # older typer runs on the click package itself
        from click import exceptions
    return exceptions


def _help_without_placeholder(command) -> None:
    """typer prints ``<bool>`` beside every command's --help, as if it took a value; show none
    there, as for skewfix's own flags (`skewfix.cli.options.flag`), on ``command`` and below it."""
    made = command.get_help_option

    def get_help_option(ctx):
        option = made(ctx)
        if option is not None:
            option.metavar = ""
        return option

    command.get_help_option = get_help_option
    for sub in getattr(command, "commands", {}).values():
        _help_without_placeholder(sub)


def main(argv: list[str] | None = None) -> int:
    click = _click_exceptions()

    _register_commands()
    command = typer.main.get_command(app)
    _help_without_placeholder(command)
    signal.signal(signal.SIGTERM, _on_terminate)
    _stopped_by["signal"] = signal.SIGINT
    argv, asked = split_debug(list(sys.argv[1:] if argv is None else argv))
    debug = asked or os.environ.get("SKEWFIX_DEBUG") == "1"
    try:
        status = command(args=argv, prog_name="skewfix", standalone_mode=False)
    except SkewfixError as exc:
        if debug:
            raise
        typer.echo(f"skewfix: {exc}", err=True)
        return exc.exit_code
    except click.NoArgsIsHelpError:
        return 0
    except click.UsageError as exc:
        if debug:
            raise
        hint = f" (see 'skewfix {exc.ctx.info_name if exc.ctx and exc.ctx.parent else ''} --help')".replace("  ", " ")
        typer.echo(f"skewfix: {exc.format_message()}{hint}", err=True)
        return 2
    except (getattr(click, "Abort", KeyboardInterrupt), KeyboardInterrupt):
        status = INTERRUPTED
    except BrokenPipeError:  # e.g. `skewfix --help | head`
        return 0
    except SystemExit as exc:
        return int(exc.code or 0) if not isinstance(exc.code, str) else 1
    except Exception as exc:  # last resort: still one line, never a traceback
        if debug:
            raise
        typer.echo(f"skewfix: unexpected {type(exc).__name__}: {plain_media_error(exc)} "
                   "(run with --debug for details)", err=True)
        return 1
    if status == INTERRUPTED:  # recent typer turns Ctrl-C into an exit status of 130 and returns it
        if "skewfix.encode" in sys.modules:  # a clip being written: make sure its temporary file goes
            sys.modules["skewfix.encode"].abort_unfinished()
        typer.echo("skewfix: stopped; nothing was written", err=True)
        return 128 + int(_stopped_by["signal"])
    return status if type(status) is int else 0  # an exit status a command raised (typer.Exit)
