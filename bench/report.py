"""The evaluation report on 10,000 texts, timed beside plain scoring of the same texts.

Issue 12 asks for the report of a 10,000-text evaluation set "well under a minute" on two
cores. The figure printed is the report's wall time, with and without a comparison against a
second version, next to the time the runtime alone takes to score the texts (so the ratio
says what the report adds on top of scoring, whatever the machine's speed). Invented help-desk
texts labelled by the demo generator; bench/run.py records the result as ``report``.

    .venv/bin/python bench/report.py [--texts 10000]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def labelled_texts(n: int) -> list[Any]:
    from textsieve.exporter.demo_data import generate
    from textsieve.registry.evalsets import LabelledText

    return [LabelledText(r["text"], r["label"]) for r in generate(n, seed=20_251_202)]  # not the training seed


def bench_report(bundle: Path, n: int = 10_000) -> dict[str, Any]:
    """Seconds to score ``n`` texts, to build the report, and to build it against a second version."""
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.report.build import build_report
    from textsieve.registry.report.html import render_html
    from textsieve.registry.runtime import Predictor

    b = open_bundle(bundle)
    examples = labelled_texts(n)
    predictor = Predictor.from_bundle(b)
    started = time.perf_counter()
    predictor.run([predictor.encode(e.text) for e in examples])
    scoring = time.perf_counter() - started

    started = time.perf_counter()
    report = build_report(b, examples, model="bench", version=1)
    html = render_html(report)
    alone = time.perf_counter() - started

    # The same bundle as "the other version": the comparison's cost does not depend on the weights.
    started = time.perf_counter()
    compared = build_report(b, examples, model="bench", version=2, against=(b, 1))
    render_html(compared)
    against = time.perf_counter() - started
    return {
        "texts": n,
        "scoring_s": round(scoring, 3),
        "report_s": round(alone, 3),
        "report_against_s": round(against, 3),
        "report_vs_scoring": round(alone / scoring, 2),
        "report_against_vs_scoring": round(against / scoring, 2),
        "bootstrap_resamples": report["bootstrap"]["resamples"],
        "json_bytes": len(json.dumps(compared)),
        "html_bytes": len(html),
        "target": "report_against_s well under 60 s on 2 cores (issue 12)",
    }


def main(argv: list[str] | None = None) -> int:
    import demo_model

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=10_000, help="evaluation-set size (default 10,000)")
    args = parser.parse_args(argv)
    model = demo_model.ensure_model(print)
    result = bench_report(model.bundle, args.texts)
    print(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
