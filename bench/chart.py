"""The PNG the README shows: throughput (left) and latency percentiles (right) from results.json."""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any


def draw(results: dict[str, Any], out: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    rt, sv, tw = results["runtime"], results["service"], results["torch_wrapper"]
    # Older results.json files kept the FLOP limit at the top; newer ones under "history".
    fl = results["history"]["flop_limit"] if "history" in results else results["flop_limit"]
    floor = results.get("http_floor")
    load = results["load"]
    batch_label = f"{load['connections']} clients × {load['texts_per_request']} texts"
    bars = [
        ("flop_limit (conv FLOPs ÷ matmul rate)", fl["texts_per_s"], "#999999"),
        ("runtime, graph only (tap tables)", rt["graph"]["texts_per_s"], "#6a8caf"),
        ("runtime (in-process, sorted)", rt["sorted"]["texts_per_s"], "#2f5f8f"),
        ("runtime, padded to max_length", rt["fixed"]["texts_per_s"], "#9fb6cd"),
        ("runtime, graph only, padded to max_length", rt["graph_fixed"]["texts_per_s"], "#c5d5e4"),
        *(
            [("convolution-layout graph only", rt["conv_graph"]["texts_per_s"], "#b0a080")]
            if "conv_graph" in rt
            else []
        ),
        (f"service, {batch_label}", sv["batched"]["texts_per_s"], "#2e7d32"),
        (f"service, {batch_label}, spans 0", sv["batched_no_spans"]["texts_per_s"], "#81c784"),
        (f"service, {load['connections']} clients × 1 text", sv["single"]["texts_per_s"], "#a5d6a7"),
        *(
            [(f"HTTP floor, {load['connections']} clients × 1 text", floor["single"]["texts_per_s"], "#bdbdbd")]
            if floor
            else []
        ),
        (f"torch_wrapper, {batch_label}", tw["batched"]["texts_per_s"], "#c62828"),
        (f"torch_wrapper, {load['connections']} clients × 1 text", tw["single"]["texts_per_s"], "#ef9a9a"),
    ]
    fig, (left, right) = plt.subplots(1, 2, figsize=(13, 5.2), gridspec_kw={"width_ratios": [1.35, 1]})
    names = [b[0] for b in bars][::-1]
    values = [b[1] for b in bars][::-1]
    left.barh(names, values, color=[b[2] for b in bars][::-1])
    for y, v in enumerate(values):
        left.text(v, y, f" {v:,.0f}", va="center", fontsize=8)
    left.set_xlabel("texts per second (higher is better)")
    left.set_xlim(0, max(values) * 1.18)
    left.tick_params(axis="y", labelsize=8)
    left.set_title("throughput")

    groups = [
        ("service\nbatched", sv["batched"]),
        ("torch_wrapper\nbatched", tw["batched"]),
        ("service\n1 text", sv["single"]),
        ("torch_wrapper\n1 text", tw["single"]),
    ]
    width = 0.26
    for i, (pct, shade) in enumerate((("p50", 0.9), ("p95", 0.6), ("p99", 0.3))):
        xs = [g + (i - 1) * width for g in range(len(groups))]
        ys = [w["latency_ms"][pct] for _, w in groups]
        right.bar(xs, ys, width, label=pct, color=(shade, shade, shade), edgecolor="black", linewidth=0.5)
        for x, y in zip(xs, ys, strict=True):
            right.text(x, y * 1.04, f"{y:.0f}", ha="center", va="bottom", fontsize=6.5)
    right.set_xticks(range(len(groups)), [g[0] for g in groups], fontsize=8)
    right.set_yscale("log")
    lowest = min(w["latency_ms"]["p50"] for _, w in groups)
    highest = max(w["latency_ms"]["p99"] for _, w in groups)
    right.set_ylim(lowest / 2, highest * 1.6)
    right.yaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
    right.yaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:g}"))
    right.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
    right.set_ylabel(f"latency per request, ms (log scale), {load['connections']} concurrent clients")
    right.legend(fontsize=8)
    right.set_title("latency")

    m = results["machine"]
    when = results["measured_at"][:16].replace("T", " ")
    fig.suptitle(
        f"textsieve bench — {m['cpu']}, {m['cores']} cores — {when} UTC — other work kept "
        f"{results['background_cores_busy']:.2f} of {m['cores']} cores busy",
        fontsize=10,
    )
    fig.tight_layout()
    tmp = out.with_name(out.name + ".tmp")
    fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    os.replace(tmp, out)


if __name__ == "__main__":
    here = Path(__file__).resolve().parent
    draw(json.loads((here / "results.json").read_text()), here / "throughput_latency.png")
    print("wrote", here / "throughput_latency.png", file=sys.stderr)
