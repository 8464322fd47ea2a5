"""The ``textsieve`` command: one verb per job, heavy imports only inside the verb that needs them."""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from textsieve import __version__
from textsieve.errors import TextsieveError
from textsieve.exporter import cli as exporter_cli

DEFAULT_REGISTRY = "./textsieve-registry"


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        # One line and exit status 2, like every other bad-input path.
        print(
            f"textsieve: error: {message} (see 'textsieve {self.prog.split()[-1]} --help')"
            if " " in self.prog
            else f"textsieve: error: {message} (see 'textsieve --help')",
            file=sys.stderr,
        )
        raise SystemExit(2)


def _registry_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--registry",
        default=os.environ.get("TEXTSIEVE_REGISTRY", DEFAULT_REGISTRY),
        help="registry folder, or a postgresql:// URL (then --blobs names the blob folder); "
        "default $TEXTSIEVE_REGISTRY or ./textsieve-registry",
    )
    p.add_argument(
        "--blobs",
        default=os.environ.get("TEXTSIEVE_BLOBS"),
        help="blob folder when --registry is a postgresql:// URL ($TEXTSIEVE_BLOBS)",
    )


def _actor_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--actor", default=None, help="who is acting (default: the OS user)")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="textsieve", description=__doc__)
    parser.add_argument("--version", action="version", version=f"textsieve {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("demo", help="invented data → train → export → publish → promote → serve")
    p.add_argument("--workdir", type=Path, default=Path("demo-run"))
    p.add_argument("--no-serve", action="store_true", help="stop after promoting")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.add_argument("--epochs", type=int, default=None)
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.demo", "run_demo"))

    exporter_cli.register(sub)

    p = sub.add_parser("publish", help="store a bundle as the next version of a model")
    p.add_argument("bundle", type=Path)
    p.add_argument("--model", required=True)
    p.add_argument("--evalset", type=Path, help="also register this labelled file as the model's evaluation set")
    p.add_argument("--reason", default="")
    _registry_arg(p)
    _actor_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_publish"))

    p = sub.add_parser("models", help="table of models")
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_models"))

    p = sub.add_parser("versions", help="table of a model's versions")
    p.add_argument("model")
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_versions"))

    p = sub.add_parser("show", help="one version in full")
    p.add_argument("model")
    p.add_argument("version", nargs="?", help="number (default: the live version)")
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_show"))

    p = sub.add_parser("promote", help="move a version to candidate or live, through the gates")
    p.add_argument("model")
    p.add_argument("version", type=int)
    p.add_argument("--to", choices=["candidate", "live"], required=True)
    p.add_argument("--reason", required=True)
    p.add_argument("--force", action="store_true", help="override failed gates (recorded)")
    _registry_arg(p)
    _actor_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_promote"))

    p = sub.add_parser("rollback", help="make the previous live version live again")
    p.add_argument("model")
    p.add_argument("--reason", required=True)
    _registry_arg(p)
    _actor_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_rollback"))

    p = sub.add_parser("history", help="audit trail of a model")
    p.add_argument("model")
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.registry.cli", "cli_history"))

    p = sub.add_parser("evalset", help="evaluation sets used by the promotion gates")
    esub = p.add_subparsers(dest="evalset_command", required=True, parser_class=_Parser)
    pe = esub.add_parser("add", help="register a labelled file as a model's evaluation set")
    pe.add_argument("model")
    pe.add_argument("file", type=Path)
    pe.add_argument("--text-field", default="text")
    pe.add_argument("--label-field", default="label")
    _registry_arg(pe)
    _actor_arg(pe)
    pe.set_defaults(func=_lazy("textsieve.registry.cli", "cli_evalset_add"))

    p = sub.add_parser("serve", help="serve predictions over HTTP")
    p.add_argument("--host", default=os.environ.get("TEXTSIEVE_HOST", "127.0.0.1"))
    p.add_argument("--port", type=int, default=int(os.environ.get("TEXTSIEVE_PORT", "8000")))
    p.add_argument("--models", help="comma-separated model names to serve (default: every model with a live version)")
    p.add_argument("--workers", type=int, help="inference workers (default: one per core)")
    p.add_argument(
        "--inference",
        choices=("processes", "threads"),
        help="run inference workers as processes (default; fastest) or as threads of the server",
    )
    _registry_arg(p)
    p.set_defaults(func=_lazy("textsieve.service.cli", "cli_serve"))

    p = sub.add_parser("predict", help="ask a running service; prints label, probabilities and spans")
    p.add_argument("texts", nargs="+")
    p.add_argument("--url", default=os.environ.get("TEXTSIEVE_URL", "http://127.0.0.1:8000"))
    p.add_argument("--model")
    p.add_argument("--version", type=int)
    p.add_argument("--spans", type=int, default=3)
    p.add_argument("--json", action="store_true", help="print the raw JSON reply")
    p.set_defaults(func=_lazy("textsieve.service.client", "cli_predict"))

    p = sub.add_parser("health", help="exit 0 when the service is ready, 1 otherwise, with one line of why")
    p.add_argument("--url", default=os.environ.get("TEXTSIEVE_URL", "http://127.0.0.1:8000"))
    p.add_argument("--timeout", type=float, default=5.0)
    p.set_defaults(func=_lazy("textsieve.service.client", "cli_health"))
    return parser


def _lazy(module: str, name: str) -> Callable[[argparse.Namespace], int]:
    def run(args: argparse.Namespace) -> int:
        import importlib

        try:
            mod = importlib.import_module(module)
        except ModuleNotFoundError as exc:
            if exc.name in ("torch", "onnxscript", "tqdm"):
                raise TextsieveError(
                    f"'{args.command}' needs the training extras: pip install 'textsieve[train]'"
                ) from exc
            if exc.name in ("fastapi", "uvicorn", "pydantic_settings", "orjson", "psycopg"):
                raise TextsieveError(
                    f"'{args.command}' needs the serving extras: pip install 'textsieve[serve]'"
                ) from exc
            raise
        result: int | None = getattr(mod, name)(args)
        return result or 0

    return run


def main(argv: Sequence[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return int(args.func(args))
    except TextsieveError as exc:
        print(f"textsieve: error: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("textsieve: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (`textsieve models | head`): not an error worth a traceback.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141


if __name__ == "__main__":
    raise SystemExit(main())
