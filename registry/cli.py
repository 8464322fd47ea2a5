"""The registry verbs of the ``textsieve`` command: publish, models, versions, show, promote,
rollback, history, evalset add, gates, review-threshold, verdicts and gc (shadow lives in shadow_cli.py), each with
its flags (:func:`register`) next to its handler.
Tables are plain aligned text, fitted to the terminal and safe to print (``registry/tables.py``);
errors are raised and the command's main() prints them as one line with the error's exit status.

Building the command line imports this module for every run of ``textsieve`` (and for every
press of TAB when completing), so the registry itself is imported inside the handlers.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from textsieve.environment import DEFAULT_REGISTRY, POSTGRES_SCHEMES, registry_location
from textsieve.errors import GateRefusedError, InputError, IntegrityError, NotFoundError, SavedThenInterrupted
from textsieve.labelled import FILE_HELP
from textsieve.registry import tables
from textsieve.registry.tables import NONE, key_values, one_line

if TYPE_CHECKING:
    from textsieve.registry.api import Registry
    from textsieve.registry.model_settings import ModelSettings, SettingValue
    from textsieve.registry.records import Agreement, EvalsetInfo, Event, GateResult


def table(
    headers: Sequence[str],
    rows: Sequence[Sequence[object]],
    *,
    right: Sequence[int] = (),
    wrap: Sequence[int] = (),
    prose: Sequence[int] = (),
    optional: Sequence[int] = (),
    shown_by: str = "",
) -> str:
    """A table fitted to the terminal (``registry/tables.py``); ``wrap`` lists the columns that may wrap,
    ``prose`` those of them holding typed sentences (their words split first when some must be),
    ``optional`` those left out (in that order) when wrapping is not enough, ``shown_by`` where they are."""
    return tables.table(
        headers, rows, right=right, wrap_columns=wrap, prose=prose, optional=optional, shown_by=shown_by
    )


def when(at: str | None) -> str:
    """A stored UTC timestamp shown to the second."""
    return NONE if not at else at[:19].replace("T", " ") + "Z"


def _open(args: argparse.Namespace, *, create: bool = False) -> Registry:
    from textsieve.registry.api import open_registry

    where = registry_location(args.registry, getattr(args, "blobs", None))
    return open_registry(where.registry, blobs=where.blobs, create=create)


def _out(text: str, stream: TextIO | None = None) -> None:
    print(text, file=stream or sys.stdout)


def gate_table(gates: Sequence[GateResult]) -> str:
    return table(
        ["GATE", "RESULT", "DETAIL"],
        [[g.name, "pass" if g.passed else "FAIL", g.detail] for g in gates],
        wrap=(2,),
        prose=(2,),
    )


# -- the verbs and their flags -------------------------------------------------------------
def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the registry verbs, each with its flags and its handler, to the ``textsieve`` command."""
    p = sub.add_parser("publish", help="store a bundle as the next version of a model")
    p.add_argument("bundle", type=Path, help="bundle folder written by 'textsieve export'")
    p.add_argument("--model", action=_Once, required=True, help="model name: a-z, 0-9, '.', '_', '-' (at most 64)")
    p.add_argument(
        "--evalset", action=_Once, type=Path, help="also register this labelled file as the model's evaluation set"
    )
    p.add_argument("--reason", action=_Once, default="", help="why, recorded in the audit trail")
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_publish)

    p = sub.add_parser("models", help="table of models")
    add_location_args(p)
    p.set_defaults(func=cli_models)

    p = sub.add_parser("versions", help="table of a model's versions")
    _model_arg(p)
    add_location_args(p)
    p.set_defaults(func=cli_versions)

    p = sub.add_parser("show", help="one version in full")
    _model_arg(p)
    p.add_argument("version", nargs="?", help="version number (default: the live version)")
    add_location_args(p)
    p.set_defaults(func=cli_show)

    p = sub.add_parser("promote", help="move a version to candidate or live, through the gates")
    _model_arg(p)
    p.add_argument("version", type=version_number, help="version number")
    p.add_argument(
        "--to",
        action=_Once,
        choices=["candidate", "live"],
        required=True,
        help="candidate: the one version under trial; live: the served one, after the gates",
    )
    p.add_argument("--reason", action=_Once, help="why, recorded in the audit trail (required unless --dry-run)")
    p.add_argument("--force", action="store_true", help="override failed gates (recorded)")
    p.add_argument(
        "--dry-run",
        action="store_true",
        help="with --to live: run the gates against the live version and print them; change and record nothing "
        "(exit 1 when a gate would refuse)",
    )
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_promote)

    p = sub.add_parser("rollback", help="make the previous live version live again")
    _model_arg(p)
    p.add_argument("--reason", action=_Once, required=True, help="why, recorded in the audit trail")
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_rollback)

    p = sub.add_parser("history", help="audit trail of a model, oldest first")
    _model_arg(p)
    p.add_argument(
        "--last",
        type=event_count,
        metavar="N",
        help="only the N most recent events (default: all; stderr says how many more there are)",
    )
    p.add_argument("--version", type=version_number, help="only this version's events")
    add_location_args(p)
    p.set_defaults(func=cli_history)

    p = sub.add_parser("evalset", help="evaluation sets used by the promotion gates")
    esub = p.add_subparsers(dest="evalset_command", required=True)
    pe = esub.add_parser("add", help="register a labelled file as a model's evaluation set")
    _model_arg(pe)
    pe.add_argument("file", type=Path, help=FILE_HELP)
    pe.add_argument("--text-field", default="text", help="JSONL key or CSV column holding the text")
    pe.add_argument("--label-field", default="label", help="JSONL key or CSV column holding the label")
    add_location_args(pe)
    _actor_arg(pe)
    pe.set_defaults(func=cli_evalset_add)

    p = sub.add_parser(
        "gates",
        help="show or change a model's promotion-gate settings (tolerances, the McNemar gate)",
        description="Without --set/--reset: a table of the settings. Keys: macro_f1_drop and ece_rise (fixed "
        "tolerances against live, on while tolerances=on); mcnemar=on refuses a candidate significantly worse "
        "than live (exact McNemar p below mcnemar_p and more texts right→wrong than wrong→right).",
    )
    _model_arg(p)
    p.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="choose a value, e.g. mcnemar=on, mcnemar_p=0.05, macro_f1_drop=0.01 (repeat for several)",
    )
    p.add_argument("--reset", action="append", default=[], metavar="KEY", help="back to the default (repeatable)")
    p.add_argument(
        "--reason", action=_Once, default="", help="why, recorded in the audit trail (required with --set/--reset)"
    )
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_gates)

    p = sub.add_parser(
        "review-threshold",
        help="show, set or clear the confidence below which the service marks results needs_review",
    )
    _model_arg(p)
    change = p.add_mutually_exclusive_group()
    change.add_argument(
        "--set",
        action=_Once,
        metavar="THRESHOLD",
        help="a probability above 0 and at most 1: results whose top probability is below it get needs_review: true",
    )
    change.add_argument("--clear", action="store_true", help="no threshold: replies carry no needs_review field")
    p.add_argument(
        "--reason", action=_Once, default="", help="why, recorded in the audit trail (required with --set/--clear)"
    )
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_review_threshold)

    p = sub.add_parser(
        "verdicts",
        help="reviewers' verdicts on a model's predictions: agreement per version, export as labelled data, deletion",
    )
    _model_arg(p)
    p.add_argument("--version", type=version_number, help="only this version's verdicts (listing and export)")
    p.add_argument("--last", type=int, default=20, metavar="N", help="list the N most recent verdicts (0: none)")
    p.add_argument(
        "--export",
        type=Path,
        metavar="FILE",
        help="write the verdicts as labelled JSONL (text, label = the reviewer's label) for train and evalset add",
    )
    p.add_argument(
        "--delete-before",
        action=_Once,
        metavar="DATE",
        help="delete the verdicts recorded before DATE (2026-11-30 = its start, UTC; or an ISO 8601 time)",
    )
    p.add_argument(
        "--delete",
        type=int,
        action="append",
        default=[],
        metavar="ID",
        help="delete the verdict with this id (repeat; an unknown id refuses the whole deletion)",
    )
    p.add_argument(
        "--reason", action=_Once, default="", help="why verdicts are deleted (required with --delete*), audited"
    )
    add_location_args(p)
    _actor_arg(p)
    p.set_defaults(func=cli_verdicts)

    p = sub.add_parser(
        "gc",
        help="delete blobs that no version or evaluation set refers to (left by killed publishes)",
    )
    p.add_argument(
        "--older-than",
        type=float,
        default=3600.0,
        metavar="SECONDS",
        help="spare unreferenced blobs younger than this: a publish in progress may be about to record them",
    )
    p.add_argument("--dry-run", action="store_true", help="list what would be deleted, delete nothing")
    add_location_args(p)
    p.set_defaults(func=cli_gc)

    from textsieve.registry import shadow_cli  # its own module (it imports this one's helpers)

    shadow_cli.register(sub)
    from textsieve.registry.report import cli as report_cli  # argparse only: as light as this module

    report_cli.register(sub)


class _Once(argparse._StoreAction):
    """A flag of a verb that changes the registry refuses a second, different value. argparse keeps the
    last, so a flag appended by a script (``promote m 3 --to candidate … --to live``) silently decided
    what was changed and what the audit trail says. Other flags keep last-wins, the getopt habit that
    wrappers (and the tests' default flags) rely on to override a default."""

    def __call__(
        self,
        parser: argparse.ArgumentParser,
        namespace: argparse.Namespace,
        values: Any,
        option_string: str | None = None,
    ) -> None:
        first = getattr(namespace, self.dest, None)
        seen: set[str] = getattr(namespace, "_given_once", set())
        if self.dest in seen and first != values:
            parser.error(f"argument {'/'.join(self.option_strings)}: given twice with different values; give it once")
        namespace._given_once = seen | {self.dest}
        setattr(namespace, self.dest, values)


def version_number(text: str) -> int:
    """argparse's type for a version: '1e3' is refused with the rule (whole numbers from 1 to 2³¹−1),
    not argparse's 'invalid int value', and 0 or -1 before the registry is opened."""
    from textsieve.registry.names import validate_version

    try:
        return validate_version(text)
    except InputError as exc:
        raise argparse.ArgumentTypeError(exc.message) from None


def event_count(text: str) -> int:
    """argparse's type for ``history --last``: a whole number of events from 1."""
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: give a whole number of events from 1 (leave --last out for all)")
    return n


def add_location_args(p: argparse.ArgumentParser) -> None:
    """``--registry`` and ``--blobs``; unset, they fall back on the environment when the verb runs."""
    p.add_argument(
        "--registry",
        help="registry folder, or a postgresql:// URL with --blobs naming its blob folder "
        f"(default: $TEXTSIEVE_REGISTRY, else {DEFAULT_REGISTRY})",
    )
    p.add_argument(
        "--blobs",
        help="blob folder: required with a postgresql:// --registry; a folder registry uses REGISTRY/blobs "
        "unless this names another (default: $TEXTSIEVE_BLOBS); pass the same one to every verb",
    )


def _model_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="model name").completer = complete_models  # type: ignore[attr-defined]


def complete_models(prefix: str, parsed_args: argparse.Namespace, **_: Any) -> list[str]:
    """argcomplete's completer for a model name: the models of a folder registry (--registry typed before
    the name, else $TEXTSIEVE_REGISTRY, else the default). A PostgreSQL registry is not asked, so that a
    press of TAB never waits on a database; any failure offers nothing rather than breaking the shell."""
    try:
        where = registry_location(getattr(parsed_args, "registry", None), getattr(parsed_args, "blobs", None))
        if where.registry.startswith(POSTGRES_SCHEMES) or not Path(where.registry, "registry.sqlite3").is_file():
            return []
        from textsieve.registry.api import open_registry

        with open_registry(where.registry, blobs=where.blobs, create=False) as reg:
            return [m.name for m in reg.models() if m.name.startswith(prefix)]
    except Exception:
        return []


def _actor_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--actor", action=_Once, help="who is acting, recorded in the audit trail (default: the OS user)")


# -- verbs --------------------------------------------------------------------------------
def cli_publish(args: argparse.Namespace) -> int:
    from textsieve.registry.records import VersionInfo

    stopped: SavedThenInterrupted | None = None
    with _open(args, create=True) as reg:
        try:
            info = reg.publish(args.bundle, args.model, actor=args.actor, reason=args.reason, evalset=args.evalset)
        except SavedThenInterrupted as exc:  # Ctrl-C in the report after the commit: say what stands
            assert isinstance(exc.result, VersionInfo)
            info, stopped = exc.result, exc
        extra, warnings = "", []
        if args.evalset is not None and stopped is None:
            es = reg.evalset(info.model)
            extra = f"; evaluation set {args.evalset.name}: {es.texts if es else 0} texts"
            warnings = [] if es is None else evalset_warnings(reg, es)
    labels = one_line(", ".join(info.labels))
    print(f"published {info.model!r} version {info.version} (labels: {labels}){extra}", file=sys.stderr)
    for warning in warnings:
        print(warning, file=sys.stderr)
    _out(str(info.version))
    if stopped is not None:
        raise stopped
    return 0


def cli_models(args: argparse.Namespace) -> int:
    with _open(args) as reg:
        models = reg.models()
    if not models:
        _out("no models yet; publish one with: textsieve publish BUNDLE --model NAME")
        return 0
    _out(
        table(
            ["MODEL", "LIVE", "CANDIDATE", "VERSIONS", "EVAL TEXTS", "UPDATED"],
            [[m.name, m.live, m.candidate, m.versions, m.evalset_texts, when(m.updated_at)] for m in models],
            right=(1, 2, 3, 4),
        )
    )
    return 0


def cli_versions(args: argparse.Namespace) -> int:
    from textsieve.registry.records import State

    with _open(args) as reg:
        versions = reg.versions(args.model)
        # Which split the figures were measured on is in each manifest alone (export --test or not).
        on_validation = {v.version for v in versions if reg.manifest(v.model, v.version).metrics.split == VALIDATION}
    # A version exported without --test reports its validation figures, the split early stopping chose
    # the epoch on: marked, so that two versions' figures are not compared as if measured alike. The
    # marker fits within the headers' width: it costs the table no column.
    mark = {v.version: VALIDATION_MARK if v.version in on_validation else " " for v in versions}
    _out(
        table(
            ["VERSION", "STATE", "ACCURACY", "MACRO-F1", "PARITY", "LABELS", "PUBLISHED", "BY", "LIVE SINCE"],
            [
                [
                    v.version,
                    v.state,
                    f"{v.accuracy:.4f}{mark[v.version]}",
                    f"{v.macro_f1:.4f}{mark[v.version]}",
                    "passed" if v.parity_passed else "FAILED",
                    _labels(v.labels),
                    when(v.created_at),
                    v.published_by,
                    when(v.promoted_at) if v.state == State.LIVE else None,
                ]
                for v in versions
            ],
            right=(0, 2, 3),
            wrap=(5, 7),
            # On a narrow terminal, first what says least here and `show` says in full: a parity that
            # passed (publish refuses a failed one), the live row's promotion time, then accuracy
            # (macro-F1, which the gates judge, stays).
            optional=((4,) if all(v.parity_passed for v in versions) else ()) + (8, 2),
            shown_by=f"'textsieve show {args.model} VERSION' shows every field",
        )
    )
    if on_validation:
        # On stderr, as history's "the last N of M": what is piped stays the table's rows alone.
        others = "" if len(on_validation) == len(versions) else ", the others on the file given to export --test"
        legend = f"{VALIDATION_MARK} measured on the validation split (exported without --test){others}"
        _out(tables.note(legend, width=tables.terminal_width(sys.stderr)), sys.stderr)
    return 0


# The split held_out_metrics names when export had no --test file (exporter/export.py).
VALIDATION = "validation"
VALIDATION_MARK = "*"


def cli_show(args: argparse.Namespace) -> int:
    from textsieve.registry.names import validate_version
    from textsieve.registry.records import GateResult, State

    with _open(args) as reg:
        if args.version is None:
            info = reg.live(args.model)
            if info is None:
                count = len(reg.versions(args.model))
                raise NotFoundError(
                    f"{args.model!r} has no live version; name one: textsieve show {args.model} N (versions 1–{count})"
                )
        else:
            info = reg.version(args.model, validate_version(args.version))
        manifest = reg.manifest(info.model, info.version)
        events = [e for e in reg.history(info.model) if e.version == info.version]
        evalset = reg.evalset(info.model)
    m = manifest
    rows: list[tuple[str, object]] = [
        ("model", info.model),
        ("version", info.version),
        ("state", info.state),
        ("labels", ", ".join(info.labels)),
        ("published", f"{when(info.created_at)} by {info.published_by}" + (f" ({info.reason})" if info.reason else "")),
        ("live since", when(info.promoted_at) if info.state == State.LIVE else NONE),
        ("previous live", info.previous_live if info.previous_live is not None else NONE),
        ("manifest sha256", info.manifest_sha256),
        (
            "held-out metrics",
            f"{m.metrics.split}, {m.metrics.texts} texts: accuracy {m.metrics.accuracy:.4f}, "
            f"macro-F1 {m.metrics.macro_f1:.4f}, ECE {m.metrics.ece:.4f}",
        ),
        (
            "parity",
            f"{'passed' if m.parity.passed else 'FAILED'}: max |Δprobability| "
            f"{m.parity.max_abs_prob_diff:.2e} (tolerance {m.parity.tolerance:.0e}) on {m.parity.texts} texts",
        ),
        ("temperature", f"{m.calibration.temperature:.4f}"),
        (
            "architecture",
            f"filter widths {m.architecture.widths} × {m.architecture.maps} maps, "
            f"embedding {m.architecture.embedding_dim}",
        ),
        (
            "lengths",
            f"max {m.lengths.max_length} tokens (truncates {m.lengths.truncation_rate:.2%}), "
            f"min {m.lengths.min_length}",
        ),
        ("vocabulary", f"{m.vocabulary.size} tokens"),
        (
            "evaluation set",
            NONE
            if evalset is None
            else f"{evalset.source}: {evalset.texts} texts, added {when(evalset.added_at)} by {evalset.added_by}",
        ),
    ]
    _out(key_values(rows))
    _out("\nfiles\n" + _files_table(info.files))
    last_gates = next((e for e in reversed(events) if e.kind in ("promote", "refuse") and e.details.get("gates")), None)
    if last_gates is not None:
        gates = [GateResult.model_validate(g) for g in last_gates.details["gates"]]
        heading = tables.note(f"gates at event {last_gates.id} ({last_gates.kind}, {when(last_gates.at)})")
        _out(f"\n{heading}\n" + gate_table(gates))
    return 0


def _files_table(files: dict[str, str]) -> str:
    """FILE and SHA256 side by side (79 columns with the bundle's names); on a narrower terminal each
    digest below its file's name, whole where it fits (``key_values``, as show's manifest sha256)."""
    rows = [(name, digest) for name, digest in sorted(files.items())]
    wide = tables.table(["FILE", "SHA256"], rows, width=None)
    limit = tables.terminal_width()
    if limit is None or max(tables.columns(line) for line in wide.splitlines()) <= limit:
        return wide
    return key_values(rows, width=limit)


def cli_promote(args: argparse.Namespace) -> int:
    from textsieve.registry.records import GateResult, Promotion

    if args.dry_run:
        return _promote_dry_run(args)
    if args.reason is None:
        raise InputError("promote needs --reason TEXT (recorded in the audit trail); only --dry-run goes without")
    stopped: SavedThenInterrupted | None = None
    with _open(args) as reg:
        try:
            result = reg.promote(
                args.model, args.version, args.to, reason=args.reason, actor=args.actor, force=args.force
            )
        except GateRefusedError as exc:
            gates = [GateResult.model_validate(g) for g in exc.context.get("gates", [])]
            _out(gate_table(gates), sys.stderr)
            # The registry's message serves the admin API too; here the override is these flags.
            from textsieve.registry.api import OVERRIDE_HINT

            hint = "fix it, or override it with --force and --reason (both recorded)"
            raise GateRefusedError(exc.message.replace(OVERRIDE_HINT, hint), **exc.context) from None
        except SavedThenInterrupted as exc:  # Ctrl-C in the report after the commit: say what stands
            assert isinstance(exc.result, Promotion)
            result, stopped = exc.result, exc
    if result.gates:
        _out(gate_table(result.gates))
    tail = f" (version {result.retired} retired)" if result.retired is not None else ""
    forced = f"; FORCED past {', '.join(g.name for g in result.gates if not g.passed)}" if result.forced else ""
    _out(f"{result.version.model!r} version {result.version.version} is now {result.version.state}{tail}{forced}")
    if stopped is not None:
        raise stopped
    return 0


def _promote_dry_run(args: argparse.Namespace) -> int:
    """The gates a promotion to live would run now, printed; nothing changed or recorded."""
    if args.to != "live":
        raise InputError("--dry-run runs the gates of a promotion to live; --to candidate has none to run")
    if args.force:
        raise InputError("--dry-run with --force: a dry run changes nothing, so there is nothing to force; drop one")
    with _open(args) as reg:
        gates = reg.check(args.model, args.version)
    _out(gate_table(gates))
    failed = [g for g in gates if not g.passed]
    if failed:
        more = f" (and {len(failed) - 1} more: {', '.join(g.name for g in failed[1:])})" if len(failed) > 1 else ""
        raise GateRefusedError(
            f"version {args.version} of {args.model!r} would not be promoted to live: gate {failed[0].name} would "
            f"refuse: {failed[0].detail}{more}; nothing was changed or recorded (dry run)"
        )
    _out(
        f"{args.model!r} version {args.version} would be promoted to live: every gate passes (dry run; nothing changed)"
    )
    return 0


def cli_rollback(args: argparse.Namespace) -> int:
    with _open(args) as reg:
        before = reg.live(args.model)
        info = reg.rollback(args.model, reason=args.reason, actor=args.actor)
    was = f" (version {before.version} retired)" if before is not None else ""
    _out(f"{info.model!r} version {info.version} is live again{was}")
    return 0


def cli_history(args: argparse.Namespace) -> int:
    with _open(args) as reg:
        events, total = reg.history_page(args.model, version=args.version, last=args.last)
    if total > len(events):
        # On stderr: what is piped stays the table alone.
        print(
            f"the last {len(events)} of {total} events (from event {events[0].id}); leave out --last for all",
            file=sys.stderr,
        )
    _out(
        table(
            ["EVENT", "TIME (UTC)", "KIND", "VERSION", "ACTOR", "REASON", "DETAIL"],
            [[e.id, when(e.at), e.kind, e.version, e.actor, e.reason or NONE, summarise(e)] for e in events],
            right=(0, 3),
            wrap=(4, 5, 6),
            prose=(5,),
        )
    )
    return 0


def cli_evalset_add(args: argparse.Namespace) -> int:
    with _open(args) as reg:
        info = reg.add_evalset(
            args.model, args.file, text_field=args.text_field, label_field=args.label_field, actor=args.actor
        )
        warnings = evalset_warnings(reg, info)
    counts = one_line(", ".join(f"{label} {n}" for label, n in info.labels.items()))
    _out(f"evaluation set for {info.model!r}: {info.texts} texts ({counts}), sha256 {info.sha256[:12]}…")
    for warning in warnings:
        print(warning, file=sys.stderr)
    return 0


def evalset_warnings(reg: Registry, info: EvalsetInfo) -> list[str]:
    """What to say about an evaluation set just registered: repeated or contradicting texts (from its
    audit event), and a size the metric gates would refuse."""
    from textsieve.registry.evalsets import repeats_warning

    event = next(
        (
            e
            for e in reversed(reg.history(info.model))
            if e.kind == "evalset" and e.details.get("evalset_id") == info.id
        ),
        None,
    )
    d = {} if event is None else event.details
    lines = [repeats_warning(int(d.get("repeated_texts", 0)), int(d.get("conflicting_texts", 0)), info.texts)]
    lines.append(small_evalset_warning(reg, info))
    return [line for line in lines if line]


def small_evalset_warning(reg: Registry, info: EvalsetInfo) -> str | None:
    """One line when the metric gates would refuse ``info`` as too small for the model's live (else
    newest) version under its settings: registering it is allowed, judging on it is not."""
    from textsieve.registry.gates import GateSettings, evalset_shortfall, too_small_advice

    reference = reg.live(info.model) or next(reversed(reg.versions(info.model)), None)
    if reference is None:
        return None
    shortfall = evalset_shortfall(info.labels, reference.labels, GateSettings.of(reg.model_settings(info.model)))
    if shortfall is None:
        return None
    return one_line(
        f"warning: the metric gates will refuse to judge a promotion to live on this set ({shortfall[0]}); "
        + too_small_advice(info.model)
    )


def cli_gates(args: argparse.Namespace) -> int:
    from textsieve.registry.model_settings import Group, parse_assignment

    values: dict[str, Any] = {}
    typed: dict[str, str] = {}
    for text in args.set:
        key, value = parse_assignment(text, Group.GATES)
        if key in values and values[key] != value:
            # dict() kept the last, silently: `--set mcnemar=on … --set mcnemar=off` turned it off.
            raise InputError(f"--set {key} given twice ({typed[key]!r}, then {text!r}); set each key once")
        values[key], typed[key] = value, text
    _reason_needs(args, bool(values or args.reset), "--set or --reset")
    with _open(args) as reg:
        if values or args.reset:
            settings, changed = reg.change_settings(
                args.model, values, reset=args.reset, reason=args.reason, actor=args.actor, group=Group.GATES
            )
        else:
            settings, changed = reg.model_settings(args.model), None
    _out(settings_table(settings.in_group(Group.GATES)))
    _out(tables.note(gates_in_force(settings)))
    if changed is not None:
        _out(f"changed: {', '.join(changed)}" if changed else "nothing changed: every value was already so")
    return 0


def _reason_needs(args: argparse.Namespace, changing: bool, flags: str) -> None:
    """--reason with nothing to change was ignored (exit 0): refused, as every flag given without the one
    it works with."""
    if args.reason and not changing:
        raise InputError(f"--reason works only with {flags} (it is recorded with the change); add one or drop --reason")


def cli_review_threshold(args: argparse.Namespace) -> int:
    from textsieve.registry.model_settings import REVIEW_THRESHOLD

    key = REVIEW_THRESHOLD.key
    if args.set is not None and not args.set.strip():
        # An empty value cleared the threshold: `--set "$THRESHOLD"` with the variable unset.
        raise InputError(f"--set {args.set!r}: give a probability above 0 and at most 1, or clear it with --clear")
    _reason_needs(args, args.set is not None or args.clear, "--set or --clear")
    with _open(args) as reg:
        value = None if args.set is None else REVIEW_THRESHOLD.parse(args.set)
        if value is not None:
            settings, changed = reg.change_settings(args.model, {key: value}, reason=args.reason, actor=args.actor)
        elif args.clear or args.set is not None:  # "--set none" clears too
            settings, changed = reg.change_settings(args.model, reset=[key], reason=args.reason, actor=args.actor)
        else:
            settings, changed = reg.model_settings(args.model), None
    v = settings.values[key]
    if v.value is None:
        text = f"{args.model}: no review threshold; replies carry no needs_review field"
    else:
        text = f"{args.model}: review threshold {v.value:g}; results whose top probability is below it need review"
    if not v.is_default:
        text += f" (set {when(v.set_at)} by {v.set_by}: {one_line(v.reason or NONE)})"
    _out(text)
    if changed == []:
        _out("nothing changed: it was already so")
    return 0


def settings_table(values: Sequence[SettingValue]) -> str:
    from textsieve.registry.model_settings import SETTINGS

    return table(
        ["SETTING", "VALUE", "DEFAULT", "SOURCE", "SET (UTC)", "BY", "WHY", "ALLOWED"],
        [
            [
                v.key,
                SETTINGS[v.key].show(v.value),
                SETTINGS[v.key].show(v.default),
                "default" if v.is_default else "set",
                when(v.set_at) if v.set_at else None,
                v.set_by,
                v.reason,
                SETTINGS[v.key].allowed,
            ]
            for v in values
        ],
        wrap=(5, 6, 7),
        prose=(6, 7),
        # SOURCE says again what SET (UTC) says (a time when set); the README's table lists each DEFAULT.
        optional=(3, 2),
        shown_by="COLUMNS=100 or a pipe shows every column",
    )


def gates_in_force(settings: ModelSettings) -> str:
    """One line: which gates compare a candidate with live, as the settings stand."""
    from textsieve.registry.model_settings import (
        ECE_RISE,
        EVALSET_MIN_PER_LABEL,
        EVALSET_MIN_TEXTS,
        MACRO_F1_DROP,
        MCNEMAR,
        MCNEMAR_P,
        SHADOW_AGREEMENT_MIN,
        SHADOW_MIN_TEXTS,
        TOLERANCES,
    )

    parts = ["parity", "labels", "cautions"]
    if settings.get(MCNEMAR):
        parts.append(f"mcnemar (refuses when significantly worse: p < {settings.get(MCNEMAR_P):g})")
    if settings.get(TOLERANCES):
        parts.append(f"macro_f1 (drop ≤ {settings.get(MACRO_F1_DROP):g}), ece (rise ≤ {settings.get(ECE_RISE):g})")
    agreement = settings.get(SHADOW_AGREEMENT_MIN)
    if agreement is not None:  # off unless set; when set it refuses promotions, so the line names it
        parts.append(
            f"shadow_agreement (agreement with live ≥ {agreement:g} over at least "
            f"{settings.get(SHADOW_MIN_TEXTS):g} shadow texts)"
        )
    size = (
        f"; the metric gates judge on an evaluation set of at least {settings.get(EVALSET_MIN_TEXTS):g} texts "
        f"and {settings.get(EVALSET_MIN_PER_LABEL):g} per label"
    )
    return "gates on promotion to live: " + ", ".join(parts) + size


def cli_verdicts(args: argparse.Namespace) -> int:
    from textsieve.registry.verdicts import export_jsonl

    deleting = args.delete_before is not None or bool(args.delete)
    _reason_needs(args, deleting, "--delete or --delete-before")
    if deleting and args.export is not None:
        raise InputError("export and delete in separate runs, so the file holds what was there before the deletion")
    if args.last < 0:
        raise InputError(f"--last {args.last}: give 0 or more verdicts to list")
    if args.export is not None:
        from textsieve.files import check_out_file

        check_out_file(args.export, flag="--export", allowed="a .jsonl file's path or a new path")
    with _open(args) as reg:
        if deleting:
            gone = reg.verdicts.delete(
                args.model, before=args.delete_before, ids=args.delete, actor=args.actor, reason=args.reason
            )
            n = len(gone.deleted)
            _out(f"deleted {n} verdict{'' if n == 1 else 's'} of {args.model!r} (audit event {gone.event_id})")
            return 0
        verdicts = reg.verdicts.of(args.model, version=args.version)
        agreement = reg.verdicts.agreement(args.model)
    if args.export is not None:
        if not verdicts:
            raise InputError(f"{_no_verdicts(args, agreement)}; nothing written to {args.export}")
        n = export_jsonl(verdicts, args.export)
        _out(f"wrote {n} verdicts to {args.export} (text, label: the reviewer's label)")
        return 0
    if not verdicts:
        _out(f"{_no_verdicts(args, agreement)}; reviewers record them on the service's page (GET /)")
        return 0
    shown = verdicts[-args.last :] if args.last else []
    if shown:
        _out(
            table(
                ["ID", "TIME (UTC)", "VERSION", "REVIEWER", "PREDICTED", "P", "VERDICT", "TEXT"],
                [
                    [
                        v.id,
                        when(v.at),
                        v.version,
                        v.reviewer,
                        v.predicted_label,
                        f"{v.predicted_probability:.3f}",
                        "confirmed" if v.agrees else f"→ {v.verdict_label}",
                        v.text,  # whole: the table wraps it to the terminal, one line a row when piped
                    ]
                    for v in shown
                ],
                right=(0, 2, 5),
                wrap=(3, 4, 6, 7),
                prose=(7,),
            )
        )
        if len(shown) < len(verdicts):
            _out(f"({len(shown)} of {len(verdicts)} shown; --last N for more)")
        _out("")
    rows = [a for a in agreement if args.version is None or a.version == args.version]
    _out(
        table(
            ["VERSION", "VERDICTS", "CONFIRMED", "AGREEMENT", "95% INTERVAL", "FIRST", "LAST"],
            [
                [
                    a.version,
                    a.verdicts,
                    a.agreed,
                    f"{a.agreed / a.verdicts:.1%}",
                    f"{a.low:.1%}–{a.high:.1%}",
                    when(a.first_at),
                    when(a.last_at),
                ]
                for a in rows
            ],
            right=(0, 1, 2, 3),
        )
    )
    _out(
        tables.note(
            "agreement: the share of labels reviewers confirmed, with a Wilson 95 % interval; a running estimate "
            "of live accuracy over the texts reviewers chose to judge, not a random sample"
        )
    )
    return 0


def _no_verdicts(args: argparse.Namespace, agreement: Sequence[Agreement]) -> str:
    """Why the listing is empty: no verdicts at all, or none on the version asked for (and which have some)."""
    if args.version is None or not agreement:
        return f"no verdicts on {args.model!r} yet"
    judged = [a.version for a in agreement]
    which = f"version {judged[0]} has" if len(judged) == 1 else f"versions {', '.join(map(str, judged))} have"
    return f"no verdicts on version {args.version} of {args.model!r} yet ({which} some)"


# -- helpers ------------------------------------------------------------------------------
def cli_gc(args: argparse.Namespace) -> int:
    if not math.isfinite(args.older_than) or args.older_than < 0:
        raise InputError(
            f"--older-than {args.older_than:g}: give a number of seconds, 0 or more "
            "(0 deletes every unreferenced blob, the default 3600 spares the last hour's)"
        )
    with _open(args) as reg:
        report = reg.collect_garbage(older_than=args.older_than, dry_run=args.dry_run)
        folder = reg.blobs.root
    verb = "would delete" if report.dry_run else "deleted"
    rows = [[digest[:16] + "…"] for digest in report.removed]
    if rows:
        _out(table(["UNREFERENCED BLOB"], rows))
    kept = f"kept {report.referenced - report.missing} referenced"
    if report.missing:
        kept += f", {report.missing} referenced missing"
    _out(
        f"{verb} {len(report.removed)} unreferenced blobs ({report.removed_bytes} bytes); {kept}; "
        f"spared {report.spared_recent} younger than {args.older_than:g} s; "
        f"{report.temporary_removed} temporary files removed"
    )
    if report.blob_folder_missing and report.missing:
        raise IntegrityError(
            f"the blob folder {folder} is missing, so every referenced blob ({report.missing}) is missing and no "
            "version can be fetched or served; restore the folder from a backup"
        )
    if report.missing:
        raise IntegrityError(
            f"{report.missing} of {report.referenced} referenced blobs are missing from {folder}; versions "
            "that use them cannot be fetched or served; restore them from a backup"
        )
    return 0


def summarise(e: Event) -> str:
    d: dict[str, Any] = e.details
    if e.kind == "publish":
        m = d.get("metrics", {})
        return f"labels {_labels(d.get('labels', []))}; macro-F1 {m.get('macro_f1', 0):.4f}"
    if e.kind == "evalset":
        repeats = f", {d['repeated_texts']} repeated" if d.get("repeated_texts") else ""
        conflicts = f", {d['conflicting_texts']} with two labels or more" if d.get("conflicting_texts") else ""
        return f"{d.get('source')}: {d.get('texts')} texts{repeats}{conflicts}"
    if e.kind == "rollback":
        return f"live {d.get('from')} → {d.get('to')}"
    if e.kind == "settings":
        return "; ".join(
            f"{key} {_shown(c.get('from'))} → {_shown(c.get('to'))}{' (default)' if c.get('default') else ''}"
            for key, c in d.get("changes", {}).items()
        )
    if e.kind == "verdicts-delete":
        before = f" recorded before {when(d['before'])}" if d.get("before") else ""
        noun = "verdict" if d.get("deleted") == 1 else "verdicts"
        return f"deleted {d.get('deleted')} {noun}{before}; ids {_ids(d.get('ids', []))}"
    if e.kind == "report_failed":
        return f"evaluation report not made: {d.get('error')}"
    gates = " ".join(f"{g['name']}:{'pass' if g['passed'] else 'FAIL'}" for g in d.get("gates", []))
    if e.kind == "refuse":
        return f"to live refused; {gates}"
    text = f"{d.get('from')} → {d.get('to')}"
    if d.get("retired") is not None:
        text += f", retired {d['retired']}"
    if d.get("replaced_candidate") is not None:
        # Events written before the state was recorded say "back" without where to.
        to = d.get("replaced_candidate_to")
        text += f", candidate {d['replaced_candidate']} back" + (f" to {to}" if to else "")
    if d.get("forced"):
        text += f"; FORCED past {', '.join(d.get('overridden', []))}"
    return text + (f"; {gates}" if gates else "")


def _shown(value: object) -> str:
    if isinstance(value, bool):
        return "on" if value else "off"
    return "none" if value is None else f"{value:g}" if isinstance(value, float) else str(value)


def _ids(ids: Sequence[int], limit: int = 8) -> str:
    shown = ",".join(map(str, ids[:limit])) or NONE
    return shown + (f",+{len(ids) - limit}" if len(ids) > limit else "")


def _labels(labels: Sequence[str], limit: int = 4) -> str:
    shown = ",".join(labels[:limit])
    return shown + (f",+{len(labels) - limit}" if len(labels) > limit else "")


__all__ = [
    "add_location_args",
    "cli_evalset_add",
    "cli_gates",
    "cli_history",
    "cli_models",
    "cli_promote",
    "cli_publish",
    "cli_review_threshold",
    "cli_rollback",
    "cli_show",
    "cli_verdicts",
    "cli_versions",
    "gate_table",
    "gates_in_force",
    "register",
    "settings_table",
    "summarise",
    "table",
    "version_number",
]
