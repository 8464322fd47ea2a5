# PYTHON_ARGCOMPLETE_OK
"""The ``textsieve`` command: the top parser, the sides' verbs, and the one mapping of failures to exit
statuses.

Each verb's flags live with its handler, in the side that owns it (``register(sub)`` in
``exporter/cli.py``, ``registry/cli.py``, ``service/cli.py``, ``service/client.py``, ``demo.py``).
Those modules are imported for every run and every completion, so they import their heavy
dependencies inside the handlers; a handler that needs an extra that is not installed ends here, as
one line saying which extra to install.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from textsieve import __version__, demo
from textsieve.errors import SavedThenInterrupted, Terminated, TextsieveError
from textsieve.exporter import cli as exporter_cli
from textsieve.registry import cli as registry_cli
from textsieve.registry.tables import one_line
from textsieve.scoring import cli as scoring_cli
from textsieve.service import cli as service_cli
from textsieve.service import client as service_client

DESCRIPTION = (
    "Export, version and serve convolutional text classifiers: train one and export it to a parity-checked "
    "ONNX bundle, publish bundles to a registry, promote versions through gates or roll them back, and serve "
    "calibrated predictions with the n-gram spans behind them over HTTP."
)
EPILOG = (
    "Run 'textsieve VERB --help' for a verb's options. Tab completion for bash or zsh: "
    'eval "$(textsieve completion bash)".'
)
SHELLS = ("bash", "zsh")

# The import that failed → the optional dependencies that provide it (pyproject.toml).
EXTRAS = {
    "torch": "train",
    "onnxscript": "train",
    "tqdm": "train",
    "fastapi": "serve",
    "uvicorn": "serve",
    "pydantic_settings": "serve",
    "orjson": "serve",
    "psycopg": "serve",
    "pyarrow": "parquet",
    "pandas": "cluster",
    "dask": "cluster",
    "distributed": "cluster",
}
EXTRA_NAMES = {"train": "training", "serve": "serving", "parquet": "Parquet", "cluster": "Dask cluster"}


class _HelpFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Shows each option's default, except the empty ones ("(default: None)" tells nobody anything)."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        default = action.default
        if default is None or default is False or (isinstance(default, str) and not default) or action.required:
            return action.help
        return super()._get_help_string(action)


if TYPE_CHECKING:
    _SubParsers = argparse._SubParsersAction[argparse.ArgumentParser]
else:  # not subscriptable at run time
    _SubParsers = argparse._SubParsersAction


class _Verbs(_SubParsers):
    """A verb's one-line help, from the list of verbs, also heads its own ``--help``."""

    def add_parser(self, name: str, **kwargs: Any) -> argparse.ArgumentParser:
        if "help" in kwargs:
            kwargs.setdefault("description", kwargs["help"])
        return super().add_parser(name, **kwargs)


class _Parser(argparse.ArgumentParser):
    """Usage errors as one line and exit status 2, like every other bad-input path."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        # argparse makes the sub-parsers from this class, so every verb, on every side, gets the
        # same help layout and error line without importing anything from here.
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)
        self.register("action", "parsers", _Verbs)

    def error(self, message: str) -> None:  # type: ignore[override]
        # self.prog is the whole command so far: "textsieve", "textsieve promote", "textsieve evalset add".
        print(f"textsieve: error: {self._name_the_verbs(message)} (see '{self.prog} --help')", file=sys.stderr)
        raise SystemExit(2)

    def _name_the_verbs(self, message: str) -> str:
        """argparse names a missing or unknown verb by the attribute it is stored in ('evalset_command'):
        call it a command, and list the commands when none was given."""
        for action in self._actions:
            if not isinstance(action, argparse._SubParsersAction) or action.dest == argparse.SUPPRESS:
                continue
            if message == f"the following arguments are required: {action.dest}":
                choices = ", ".join(map(repr, action.choices))
                return f"the following arguments are required: command (choose from {choices})"
            if message.startswith(f"argument {action.dest}: "):
                return "argument command: " + message.removeprefix(f"argument {action.dest}: ")
        return message


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="textsieve", description=DESCRIPTION, epilog=EPILOG)
    parser.add_argument("--version", action="version", version=f"textsieve {__version__}")
    sub: argparse._SubParsersAction[argparse.ArgumentParser] = parser.add_subparsers(
        dest="command", required=True, parser_class=_Parser
    )
    demo.register(sub)
    exporter_cli.register(sub)
    registry_cli.register(sub)
    service_cli.register(sub)
    service_client.register(sub)
    scoring_cli.register(sub)
    _register_completion(sub)
    return parser


def _register_completion(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("completion", help="print the shell code that completes textsieve's verbs and flags")
    p.add_argument(
        "shell", choices=SHELLS, help='shell to complete in; load it with eval "$(textsieve completion SHELL)"'
    )
    p.set_defaults(func=cli_completion)


def cli_completion(args: argparse.Namespace) -> int:
    from argcomplete.shell_integration import shellcode

    print(shellcode(["textsieve"], shell=args.shell), end="")
    return 0


def run(args: argparse.Namespace) -> int:
    """The verb's handler; a missing optional dependency becomes the extra to install."""
    try:
        return int(args.func(args) or 0)
    except ModuleNotFoundError as exc:
        extra = EXTRAS.get((exc.name or "").partition(".")[0])
        if extra is None:
            raise
        raise TextsieveError(
            f"'{args.command}' needs the {EXTRA_NAMES[extra]} extras: pip install 'textsieve[{extra}]'"
        ) from exc


def _interrupted_within(exc: BaseException) -> bool:
    """Whether a KeyboardInterrupt is among the exceptions that led to ``exc``."""
    seen: set[int] = set()
    cause: BaseException | None = exc
    while cause is not None and id(cause) not in seen:
        if isinstance(cause, KeyboardInterrupt):
            return True
        seen.add(id(cause))
        cause = cause.__cause__ or cause.__context__
    return False


def _reader_gone() -> None:
    """stdout's reader has gone: what is still buffered goes nowhere, so the flush at exit cannot fail
    too. 141 is the status a shell gives a process that SIGPIPE ended (128 + 13; common practice)."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    if "_ARGCOMPLETE" in os.environ:
        # A shell asks for completions (the code 'textsieve completion' prints sets this): answer and exit.
        # Plain runs skip even the import.
        import argcomplete

        argcomplete.autocomplete(parser)
    try:
        code = run(parser.parse_args(argv))
        # Output to a pipe is buffered: a reader gone (`| head`) shows here, where it is handled below,
        # not in the flush at exit ("Exception ignored ... BrokenPipeError", exit status 120).
        sys.stdout.flush()
        return code
    except SystemExit:  # --help and --version print, then argparse exits: the same flush, the same quiet end
        try:
            sys.stdout.flush()
        except BrokenPipeError:
            _reader_gone()
            raise SystemExit(141) from None
        raise
    except TextsieveError as exc:
        # One line, whatever the message quotes: a path, a label or another server's problem detail may
        # hold line breaks or terminal escapes.
        print(f"textsieve: error: {one_line(exc.message)}", file=sys.stderr)
        return exc.exit_code
    except SavedThenInterrupted as exc:
        print(f"textsieve: interrupted after the change was saved: {exc.saved}", file=sys.stderr)
        return 130
    except Terminated as exc:
        print(_stopped("stopped by SIGTERM", exc), file=sys.stderr)
        return 143
    except KeyboardInterrupt as exc:
        print(_stopped("interrupted", exc), file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (`textsieve history m | head`): not an error worth a traceback. Before
        # `except Exception`, which would otherwise take it (BrokenPipeError is an OSError).
        _reader_gone()
        return 141
    except Exception as exc:
        # Ctrl-C inside a native module's import (onnxruntime's) surfaces as its ImportError.
        if _interrupted_within(exc):
            print("textsieve: interrupted", file=sys.stderr)
            return 130
        raise


def _stopped(how: str, exc: KeyboardInterrupt) -> str:
    """The one line for a verb stopped by a signal: how, and what its work left (a note the verb added,
    such as ``score``'s rows kept for ``--resume``), never two lines saying the same stop."""
    notes = getattr(exc, "__notes__", None)
    return f"textsieve: {how}" + (f"; {one_line(notes[-1])}" if notes else "")


if __name__ == "__main__":
    raise SystemExit(main())
