"""``textsieve evaluate``: a version's evaluation report, written as report.json and report.html
and stored in the registry (computed once per version, evaluation set and version compared).

Imported for every run of ``textsieve``: the registry and NumPy are imported inside the handler.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from textsieve.errors import InputError

if TYPE_CHECKING:
    from textsieve.registry.api import Registry


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    from textsieve.registry.cli import _actor_arg, add_location_args

    p = sub.add_parser(
        "evaluate",
        help="a version's evaluation report (report.json and a self-contained report.html)",
        description="Score a version on an evaluation set and write report.json and report.html: metrics with "
        "bootstrap intervals, per-class figures, confusion matrix, calibration, selective prediction, "
        "accuracy by length, the worst mistakes, and with --against a paired comparison. The report is "
        "stored in the registry, so asking again is instant.",
    )
    from textsieve.registry.cli import complete_models  # loaded already: it registers this verb

    p.add_argument("model", help="model name").completer = complete_models  # type: ignore[attr-defined]
    p.add_argument("version", help="version number")
    from textsieve.labelled import FILE_HELP

    p.add_argument("--evalset", type=Path, help=f"{FILE_HELP} (default: the model's evaluation set)")
    p.add_argument(
        "--text-field", help="with --evalset: the JSON key or CSV/TSV column holding the text (default: text)"
    )
    p.add_argument(
        "--label-field", help="with --evalset: the JSON key or CSV/TSV column holding the label (default: label)"
    )
    p.add_argument("--against", metavar="live|N", help="compare with the live version or version N on the same texts")
    p.add_argument("--out", type=Path, help="folder for report.json and report.html (default: report-MODEL-VERSION)")
    p.add_argument(
        "--run", type=Path, metavar="DIR", help="the version's training run folder: adds how its embeddings moved"
    )
    p.add_argument(
        "--against-run", type=Path, metavar="DIR", help="the other version's run folder (with --against): compares them"
    )
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_evaluate)


def _against(reg: Registry, model: str, version: int, text: str | None) -> int | None:
    from textsieve.registry.names import validate_version

    if text is None:
        return None
    if text == "live":
        live = reg.live(model)
        if live is None:
            raise InputError(f"--against live: {model!r} has no live version; name one with --against N")
        if live.version == version:
            print(f"version {version} is the live version: nothing to compare with", file=sys.stderr)
            return None
        return live.version
    try:
        n = validate_version(text)
    except InputError as exc:
        raise InputError(f"--against {text!r}: give 'live' or a version number") from exc
    if n == version:
        raise InputError(f"--against {n}: that is the version under report; name another one or 'live'")
    return n


# A flag that only means something with another one, and that one (their help lines say "with …").
DEPENDENT_FLAGS = (
    ("against_run", "--against-run", "against", "--against"),
    ("text_field", "--text-field", "evalset", "--evalset"),
    ("label_field", "--label-field", "evalset", "--evalset"),
)


def _check_dependent_flags(args: argparse.Namespace) -> None:
    """Refuse a flag given without the flag it works with: it was ignored, and the run exited 0."""
    for name, flag, needs, needed in DEPENDENT_FLAGS:
        if getattr(args, name) is not None and getattr(args, needs) is None:
            raise InputError(f"{flag} works only with {needed}; add {needed} or drop {flag}")


def cli_evaluate(args: argparse.Namespace) -> int:
    from textsieve.files import atomic_write_bytes, check_out_file, check_writable, nearest_folder, special_file
    from textsieve.registry.cli import _open
    from textsieve.registry.evalsets import load_evalset
    from textsieve.registry.names import validate_version
    from textsieve.registry.report.files import HTML_FILE, JSON_FILE

    _check_dependent_flags(args)
    version = validate_version(args.version)
    examples = None
    if args.evalset is not None:
        fields = {"text_field": args.text_field or "text", "label_field": args.label_field or "label"}
        examples = load_evalset(args.evalset, **fields).examples
    out = args.out if args.out is not None else Path(f"report-{args.model}-{version}")
    # A place the report cannot be written to is said before the scoring, not after it.
    if out.exists() and not out.is_dir():
        what = special_file(out) or "a file"
        raise InputError(f"--out {out}: is {what}; --out names a folder for {JSON_FILE} and {HTML_FILE}")
    for name in (JSON_FILE, HTML_FILE):
        check_out_file(out / name, flag="--out", allowed=f"a folder whose {name} is a regular file or absent")
        # The report is renamed over OUT/NAME: an evaluation set of that name there would be lost.
        if args.evalset is not None and (out / name).exists() and os.path.samefile(out / name, args.evalset):
            raise InputError(
                f"--out {out}: the report's {name} would replace the evaluation set {args.evalset}; "
                "choose another --out"
            )
    writes_in = nearest_folder(out)
    if writes_in is not None:
        check_writable(writes_in, out)
    with _open(args) as reg:
        reg.version(args.model, version)  # unknown model or version: said before any scoring
        against = _against(reg, args.model, version, args.against)

        def progress(stage: str) -> None:
            print(f"evaluate: {stage}…", file=sys.stderr, flush=True)

        for flag, folder in (("--run", args.run), ("--against-run", args.against_run)):
            if folder is not None and not folder.is_dir():
                raise InputError(f"{flag} {folder}: not a folder; give a training run folder (textsieve train --out)")
        info = reg.report(
            args.model,
            version,
            against=against,
            examples=examples,
            actor=args.actor,
            progress=progress,
            run=args.run,
            against_run=args.against_run if against is not None else None,
        )
        _, json_bytes = reg.report_file(info, "json")
        _, html_bytes = reg.report_file(info, "html")
    import json

    report = json.loads(json_bytes)
    try:
        out.mkdir(parents=True, exist_ok=True)
        atomic_write_bytes(out / JSON_FILE, json_bytes)
        atomic_write_bytes(out / HTML_FILE, html_bytes)
    except OSError as exc:
        raise InputError(f"{out}: cannot write the report ({exc.strerror or exc}); choose another --out") from exc
    print(summary(report))
    print(f"\nwrote {out / JSON_FILE} and {out / HTML_FILE}", file=sys.stderr)
    return 0


def summary(report: dict[str, Any]) -> str:
    """The report's headline figures as readable tables."""
    from textsieve.registry.cli import table

    def f(x: object) -> str:
        return "-" if not isinstance(x, int | float) else f"{x:.4f}"

    def ci(pair: object) -> str:
        return "-" if not isinstance(pair, list) or None in pair else f"{pair[0]:.4f}–{pair[1]:.4f}"

    m = report["metrics"]
    lines = [
        f"{report['model']} version {report['version']} on {report['n']} texts "
        f"(evaluation set {report['evalset_sha256'][:12]}…)",
        "",
        table(
            ["FIGURE", "VALUE", "95% INTERVAL"],
            [
                ["accuracy", f(m["accuracy"]), ci(m["accuracy_ci"])],
                ["macro-F1", f(m["macro_f1"]), ci(m["macro_f1_ci"])],
                ["ECE", f(m["ece"]), ""],
                ["MCE", f(m["mce"]), ""],
                ["Brier", f(m["brier"]), ""],
                ["NLL", f(m["nll"]), ""],
            ],
            right=(1, 2),
        ),
        "",
        table(
            ["LABEL", "PRECISION", "RECALL", "F1", "SUPPORT"],
            [[k, f(v["precision"]), f(v["recall"]), f(v["f1"]), v["support"]] for k, v in report["per_class"].items()],
            right=(1, 2, 3, 4),
            wrap=(0,),
        ),
        "",
        table(
            ["TARGET ACCURACY", "THRESHOLD", "KEEPS"],
            [
                [f"{t['target_accuracy']:.2f}", f(t["threshold"]), f"{t['coverage']:.1%}"]
                for t in report["selective_targets"]
            ],
            right=(0, 1, 2),
        ),
    ]
    c = report.get("comparison")
    if c:
        lines += [
            "",
            f"against version {c['against']}: accuracy {c['accuracy_delta']:+.4f} ({ci(c['accuracy_delta_ci'])}), "
            f"macro-F1 {c['macro_f1_delta']:+.4f} ({ci(c['macro_f1_delta_ci'])}); right→wrong {c['right_to_wrong']}, "
            f"wrong→right {c['wrong_to_right']}, wrong→other wrong {c['wrong_to_other_wrong']}; "
            f"McNemar p {c['mcnemar_p']:.4g}; detectable difference {f(c['minimum_detectable_difference'])}",
        ]
    for note in report.get("notes", []):
        lines.append(f"note: {note}")
    return "\n".join(lines)


__all__ = ["cli_evaluate", "register", "summary"]
