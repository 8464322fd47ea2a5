"""``textsieve shadow MODEL``: how the candidate labels live traffic, from the counts replicas flushed.

Imported whenever the command line is built, so the registry is imported inside the handler.
"""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from textsieve.errors import InputError
from textsieve.registry.cli import _open, _out, add_location_args, complete_models, table, version_number, when
from textsieve.registry.tables import NONE, key_values

if TYPE_CHECKING:
    from textsieve.registry.records import VersionInfo
    from textsieve.registry.shadow import ShadowCounts, StoredText


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "shadow",
        help="agreement of the candidate with the live version on live traffic scored in the shadow",
    )
    p.add_argument("model", help="model name").completer = complete_models  # type: ignore[attr-defined]
    p.add_argument("--live", type=version_number, help="live version of the pair (default: the current live version)")
    p.add_argument(
        "--candidate", type=version_number, help="candidate version of the pair (default: the current candidate)"
    )
    p.add_argument("--all", action="store_true", help="a table of every pair with counts instead")
    p.add_argument(
        "--texts",
        type=int,
        default=0,
        metavar="N",
        help="also show the newest N disagreeing texts (kept only where a replica was told to keep them)",
    )
    add_location_args(p)
    p.set_defaults(func=cli_shadow)


# Disagreeing texts shown at most: far more than a replica keeps (TEXTSIEVE_SHADOW_KEEP_TEXTS), and
# within what the database's integer takes (a larger --texts was an OverflowError).
MAX_TEXTS = 1_000_000


def cli_shadow(args: argparse.Namespace) -> int:
    if not 0 <= args.texts <= MAX_TEXTS:
        raise InputError(f"--texts {args.texts}: give 0 to {MAX_TEXTS:,}")
    with _open(args) as reg:
        if args.all:
            _out(pairs_table(reg.shadow_counts(args.model)))
            return 0
        for number in (args.live, args.candidate):
            if number is not None:
                reg.version(args.model, number)  # NotFoundError naming the versions it has
        live = args.live if args.live is not None else _num(reg.live(args.model))
        candidate = args.candidate if args.candidate is not None else _num(reg.candidate(args.model))
        if live is not None and live == candidate:
            # A version is never scored in its own shadow; "no counts yet" would suggest waiting for some.
            raise InputError(
                f"--live and --candidate both name version {live} of {args.model!r}; a pair is two versions"
            )
        if live is None or candidate is None:
            missing = "live version" if live is None else "candidate"
            _out(
                f"{args.model!r} has no {missing}, so no current pair; name one with --live N --candidate M, "
                "or see every pair with --all"
            )
            return 0
        counts = reg.shadow_pair(args.model, live, candidate)
        texts = reg.shadow_texts(args.model, live, candidate, args.texts) if args.texts else []
    if counts is None:
        _out(
            f"no shadow counts yet for candidate v{candidate} beside live v{live} of {args.model!r}: replicas "
            "score a sample of live texts with the candidate (TEXTSIEVE_SHADOW_RATE) and flush every "
            "TEXTSIEVE_SHADOW_FLUSH_SECONDS"
        )
        return 0
    _out(render(counts, texts, asked=args.texts))
    return 0


def _num(info: VersionInfo | None) -> int | None:
    return None if info is None else info.version


def render(c: ShadowCounts, texts: list[StoredText], *, asked: int = 0) -> str:
    lines = [
        f"{c.model}: candidate v{c.candidate_version} in the shadow of live v{c.live_version} "
        f"({c.flushes} flushes, {when(c.first_at)} – {when(c.updated_at)})",
    ]
    rows: list[list[object]] = [["texts compared", f"{c.texts:,}"]]
    if c.texts:
        lo, hi = c.agreement_interval()
        rows.append(["agreement", f"{c.agreed / c.texts:.2%}  (95 % Wilson interval {lo:.2%} – {hi:.2%})"])
        rows.append(["mean change, P(live label)", f"{c.mean_delta:+.4f}  (candidate minus live)"])
    # Not only a full queue: a failed batch (a worker died) and a stop's leftovers count here too.
    rows.append(["dropped", f"{c.dropped:,} sampled texts not scored (queue full, scoring failed or service stopped)"])
    lines.append(key_values([(str(k), v) for k, v in rows]))
    if c.transitions:
        lines += ["", "label transitions (rows: live label, columns: candidate label)", transition_table(c)]
    if asked and not texts:
        # --texts printed nothing at all, which read as the flag being ignored.
        lines += [
            "",
            "no disagreeing texts kept for review: replicas keep the newest N only with "
            "TEXTSIEVE_SHADOW_KEEP_TEXTS=N, for TEXTSIEVE_SHADOW_KEEP_DAYS (7)",
        ]
    if texts:
        lines += ["", f"newest {len(texts)} disagreeing texts kept for review"]
        lines.append(
            table(
                ["TIME (UTC)", "LIVE", "P", "CANDIDATE", "P", "TEXT"],
                [
                    [
                        when(t.at),
                        t.live_label,
                        f"{t.live_probability:.2f}",
                        t.candidate_label,
                        f"{t.candidate_probability:.2f}",
                        t.text,  # whole: table() shows line breaks as ↵ and wraps it to the terminal
                    ]
                    for t in texts
                ],
                right=(2, 4),
                wrap=(1, 3, 5),
            )
        )
    lines += [
        "",
        "Agreement is not accuracy: it says how often the candidate would change a label people see. "
        "Check disagreements with reviewers before promoting.",
    ]
    return "\n".join(lines)


def transition_table(c: ShadowCounts) -> str:
    live_labels = sorted({t.live_label for t in c.transitions})
    cand_labels = sorted({t.candidate_label for t in c.transitions})
    cells = {(t.live_label, t.candidate_label): t.texts for t in c.transitions}
    rows = [[a, *[f"{cells.get((a, b), 0):,}" for b in cand_labels]] for a in live_labels]
    return table(["LIVE \\ CANDIDATE", *cand_labels], rows, right=tuple(range(1, len(cand_labels) + 1)), wrap=(0,))


def pairs_table(pairs: list[ShadowCounts]) -> str:
    if not pairs:
        return "no shadow counts yet"
    rows = []
    for c in pairs:
        lo, hi = c.agreement_interval()
        agreement = NONE if not c.texts else f"{c.agreed / c.texts:.2%}"
        interval = NONE if not c.texts else f"{lo:.2%} – {hi:.2%}"
        rows.append(
            [
                c.live_version,
                c.candidate_version,
                f"{c.texts:,}",
                agreement,
                interval,
                f"{c.dropped:,}",
                when(c.updated_at),
            ]
        )
    return table(
        ["LIVE", "CANDIDATE", "TEXTS", "AGREEMENT", "95 % INTERVAL", "DROPPED", "UPDATED (UTC)"],
        rows,
        right=(0, 1, 2, 5),
    )


__all__ = ["cli_shadow", "pairs_table", "register", "render", "transition_table"]
