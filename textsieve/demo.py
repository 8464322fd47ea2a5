"""``textsieve demo``: the whole job on invented data, from nothing to a served model.

invented help-desk messages → train → export (parity-checked) → publish → promote → serve
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import shlex
from pathlib import Path

from textsieve.environment import registry_location
from textsieve.registry.cli import add_location_args, cli_models

MODEL = "helpdesk"
EXAMPLE = [
    "The chain is not broken, but I was charged twice this month.",
    "The gears were slipping last week, but you fixed them straight away. Thanks!",
]


def _step(n: int, text: str) -> None:
    print(f"\n== step {n}/6: {text}", flush=True)


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``demo`` to the ``textsieve`` command."""
    p = sub.add_parser("demo", help="invented data → train → export → publish → promote → serve")
    p.add_argument("--workdir", type=Path, default=Path("demo-run"), help="folder for the data, run and bundle")
    p.add_argument("--no-serve", action="store_true", help="stop after promoting")
    p.add_argument("--host", default="127.0.0.1", help="address to serve on")
    p.add_argument("--port", type=int, default=8000, help="port to serve on")
    p.add_argument("--epochs", type=int, help="upper bound on training epochs (default: that of 'textsieve train')")
    add_location_args(p)
    p.set_defaults(func=run_demo)


def run_demo(args: argparse.Namespace) -> int:
    # Where the registry is, checked before minutes of training rather than after.
    where = registry_location(args.registry, args.blobs)

    from textsieve.exporter.demo_data import write_splits
    from textsieve.exporter.export import export
    from textsieve.exporter.train import TrainConfig, train
    from textsieve.registry import open_registry
    from textsieve.service.cli import cli_serve, listen

    if not args.no_serve:
        # Likewise the address it will serve on: a port in use is one line now, not after training.
        for sock in listen(args.host, args.port):
            sock.close()

    work: Path = args.workdir
    registry = where.registry

    _step(1, "invented data: help-desk messages to a fictional bike-share and tool library")
    paths = write_splits(work / "data")
    for name, path in paths.items():
        rows = sum(1 for _ in path.open(encoding="utf-8"))
        print(f"  {name:<5} {rows:>5} messages  {path}")

    _step(2, "train a convolutional classifier (Kim, 2014 defaults)")
    config = TrainConfig(data=paths["train"], out=work / "run", valid=paths["valid"])
    if args.epochs:
        config = dataclasses.replace(config, epochs=args.epochs)
    run = train(config)
    print(f"  run folder: {run}")

    _step(3, "export to ONNX, calibrate, check parity against PyTorch")
    bundle = work / "bundle"
    manifest = export(run, bundle, test=paths["test"], log=lambda m: print(f"  {m}", flush=True))
    print(
        f"  bundle: {bundle}  (test accuracy {manifest.metrics.accuracy:.4f}, macro-F1 {manifest.metrics.macro_f1:.4f})"
    )

    _step(4, f"publish to the registry at {registry}")
    with open_registry(registry, blobs=where.blobs) as reg:
        info = reg.publish(bundle, MODEL, reason="demo", evalset=paths["test"])
        print(f"  published {MODEL} version {info.version}")

        _step(5, "promote through the gates: candidate, then live")
        reg.promote(MODEL, info.version, to="candidate", reason="demo: first check")
        promotion = reg.promote(MODEL, info.version, to="live", reason="demo: gates passed")
        for gate in promotion.gates:
            print(f"  gate {gate.name:<10} {'passed' if gate.passed else 'FAILED'}  {gate.detail}")
    cli_models(argparse.Namespace(registry=registry, blobs=where.blobs))

    url = f"http://{args.host}:{args.port}"
    body = json.dumps({"texts": EXAMPLE, "spans": 2})
    print("\n  try it (from another terminal once the service says it is ready):")
    print(f"    curl -s {url}/v1/predict -H 'content-type: application/json' -d {shlex.quote(body)}")
    print(f"    textsieve predict --url {url} {shlex.quote(EXAMPLE[0])}")
    print(f"    open {url}/ in a browser for the reviewer page")
    if args.no_serve:
        print("\n(--no-serve: not starting the service)")
        return 0
    _step(6, f"serve on {url} (Ctrl-C to stop)")
    return cli_serve(argparse.Namespace(host=args.host, port=args.port, registry=registry, blobs=where.blobs))
