"""``textsieve score`` side by side with the in-process runtime, its memory against the input's size,
and a two-worker Dask cluster against local scoring. Called by bench/run.py (``results["scoring"]``);
runs alone at any size:

    .venv/bin/python bench/score.py [--texts 100000] [--rss-rows 10000 1000000] [--dask-texts 100000]

- ``score_vs_runtime``: ``textsieve score in.jsonl --out out.jsonl`` end to end (process start, bundle
  check, reading, scoring on one worker process per core, writing) against the runtime's own pipeline
  (one process per core with a single-thread session, length-sorted chunks, no I/O;
  bench/inprocess.py) on the same texts.
- ``fixed_seconds``: the same command on a one-row file (process start, imports, the registry and
  bundle checks, the workers' start and model load, writing, exit): what every run pays whatever
  its size. ``ceiling_at_fixed_cost`` = runtime ÷ (runtime + fixed): the best ``score_vs_runtime``
  can be at this size if reading, laying out and writing the rows cost nothing.
- ``score_vs_runtime_large``: the large input of ``peak_rss`` (1,000,000 rows by default, the same
  texts over again) end to end, against the runtime's rate on the same texts measured above: the
  fixed cost spread over ten times the rows, what a backlog sees.
- ``peak_rss``: the peak resident memory of the scoring process and of the whole process tree
  (workers included), sampled every 50 ms, for a small and a large input of the same texts.
- ``dask_vs_local``: a scheduler and two ``dask worker --nthreads 1`` processes started with Dask's
  CLI on loopback, scoring a Parquet file, against local scoring of the same file.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import inprocess  # noqa: E402
from texts import bench_texts  # noqa: E402

BIN = Path(sys.executable).parent


def _write_jsonl(path: Path, texts: list[str], rows: int) -> Path:
    with open(path, "w", encoding="utf-8") as f:
        for i in range(rows):
            f.write(json.dumps({"id": i, "text": texts[i % len(texts)]}, ensure_ascii=False) + "\n")
    return path


def _tree_rss(pid: int) -> tuple[int, int]:
    """(this process's RSS, the RSS of it and every descendant), bytes."""
    import psutil

    try:
        top = psutil.Process(pid)
        own = top.memory_info().rss
        total = own + sum(c.memory_info().rss for c in top.children(recursive=True))
    except psutil.Error:
        return 0, 0
    return own, total


def _env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TEXTSIEVE_")}
    return env | {"PYTHONPATH": str(ROOT)}


def run_score(argv: list[str]) -> dict[str, float]:
    """Run ``textsieve score`` and sample its memory; wall seconds and peak RSS in MB."""
    cmd = [sys.executable, "-m", "textsieve.cli", "score", *argv, "--progress-every", "3600"]
    # Output to files, not pipes: the end is when the scoring process ends (what a shell waits for),
    # taken at once rather than at the next 50 ms sample (up to 0.05 s late, a seventh of a one-row
    # run), and not when the fork server, which shares the pipes, has ended too.
    with tempfile.TemporaryFile("w+") as out_file, tempfile.TemporaryFile("w+") as err_file:
        started = time.perf_counter()
        proc = subprocess.Popen(cmd, env=_env(), stdout=out_file, stderr=err_file, text=True)
        peak = [0, 0]
        done = threading.Event()

        def sample() -> None:
            while not done.is_set():
                own, tree = _tree_rss(proc.pid)
                peak[0], peak[1] = max(peak[0], own), max(peak[1], tree)
                done.wait(0.05)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        try:
            proc.wait()
            wall = time.perf_counter() - started
        finally:
            done.set()
            sampler.join()
        err_file.seek(0)
        err = err_file.read()
    peak_own, peak_tree = peak
    if proc.returncode != 0:
        raise RuntimeError(f"textsieve score failed ({proc.returncode}): {err.strip()[-500:]}")
    return {"seconds": wall, "peak_rss_mb": peak_own / 2**20, "peak_tree_rss_mb": peak_tree / 2**20}


def runtime_seconds(bundle: Path, texts: list[str], sessions: int) -> float:
    """The runtime's pipeline over ``texts`` once, one process per core, encoder caches cold."""
    with inprocess.Processes(bundle, texts, sessions, warm=False, only_sorted=True) as runtime:
        return runtime.once("sorted")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def _dask(work: Path, registry: Path, source: Path, local_seconds: float) -> dict[str, Any]:
    import pyarrow.parquet as pq

    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    logs = open(work / "dask.log", "wb")  # noqa: SIM115 - closed in finally
    procs = [
        subprocess.Popen(
            [str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
            stdout=logs,
            stderr=subprocess.STDOUT,
            env=_env(),
        )  # fmt: skip
    ]
    try:
        for i in range(2):
            procs.append(
                subprocess.Popen(
                    [
                        str(BIN / "dask"),
                        "worker",
                        address,
                        "--nthreads",
                        "1",
                        "--no-nanny",
                        "--no-dashboard",
                        "--name",
                        f"bench-{i}",
                    ],
                    stdout=logs,
                    stderr=subprocess.STDOUT,
                    env=_env(),
                )  # fmt: skip
            )
        from distributed import Client

        with Client(address, timeout="60s", set_as_default=False) as client:  # type: ignore[no-untyped-call]
            client.wait_for_workers(2, timeout=120)
        got = run_score([str(source), "--model", demo_model.MODEL_NAME, "--out", str(work / "dask-out"),
                         "--registry", str(registry), "--cluster", address])  # fmt: skip
    finally:
        for p in procs:
            p.send_signal(signal.SIGTERM)
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
        logs.close()
    groups = pq.ParquetFile(source).num_row_groups
    return {
        "partitions": groups,
        "seconds": round(got["seconds"], 2),
        "local_seconds": round(local_seconds, 2),
        "dask_vs_local": round(local_seconds / got["seconds"], 3),
        # Measured 2026-12-05 (bench/README.md, "Where a Dask run's extra time goes"), 100,000 rows.
        "overhead": (
            "~0.6 s before the first partition starts (the client's imports of textsieve and distributed, "
            "connecting, the 4 MB bundle to each worker); each worker's first partition imports pandas (through "
            "pyarrow), onnxruntime and textsieve and builds its session (~0.3 s); each worker reads its rows "
            "as Python rows, lays them out and converts them to Arrow (~0.2 CPU-s a 50,000 rows, the local run's "
            "parent's work); Dask itself takes ~0.15 CPU-s in the scheduler and ~0.1-0.3 in each worker, on the "
            "two cores the workers score on: ~1.2 CPU-s above the local run's ~3.6"
        ),
    }


def bench_score(
    work: Path,
    *,
    bundle: Path | None = None,
    texts: int = 100_000,
    rss_rows: tuple[int, int] = (10_000, 1_000_000),
    dask_texts: int = 100_000,
    say: Any = print,
) -> dict[str, Any]:
    """Every scoring figure, measured now; ``work`` is emptied first."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    demo_model.compile_bytecode()  # start-up as an installed package has it: score_vs_runtime counts it
    model = demo_model.ensure_model(say)
    bundle = bundle or model.bundle
    registry = demo_model.live_registry(demo_model.DemoModel(model.run, bundle, model.source), work / "registry")
    cores = len(os.sched_getaffinity(0))
    pool = bench_texts(min(texts, 20_000))
    corpus = [pool[i % len(pool)] for i in range(texts)]
    common = ["--model", demo_model.MODEL_NAME, "--registry", str(registry)]

    say(f"score_vs_runtime: {texts:,} texts …")
    src = _write_jsonl(work / "in.jsonl", corpus, texts)
    end_to_end = run_score([str(src), "--out", str(work / "out.jsonl"), *common])
    runtime = runtime_seconds(bundle, corpus, cores)
    result: dict[str, Any] = {
        "texts": texts,
        "cores": cores,
        "score_seconds": round(end_to_end["seconds"], 2),
        "runtime_seconds": round(runtime, 2),
        "score_texts_per_s": round(texts / end_to_end["seconds"]),
        "runtime_texts_per_s": round(texts / runtime),
        "score_vs_runtime": round(runtime / end_to_end["seconds"], 3),
    }
    one = _write_jsonl(work / "one.jsonl", corpus, 1)
    fixed = min(run_score([str(one), "--out", str(work / "one.out.jsonl"), *common])["seconds"] for _ in range(3))
    result["fixed_seconds"] = round(fixed, 3)
    result["ceiling_at_fixed_cost"] = round(runtime / (runtime + fixed), 3)

    small, large = rss_rows
    say(f"peak RSS: {small:,} rows against {large:,} rows …")
    rss = {}
    for rows in (small, large):
        path = _write_jsonl(work / f"rss-{rows}.jsonl", pool, rows)
        got = run_score([str(path), "--out", str(work / f"rss-{rows}.out.jsonl"), *common])
        rss[rows] = got
        path.unlink()
        (work / f"rss-{rows}.out.jsonl").unlink()
    result["peak_rss"] = {
        "rows": [small, large],
        "scoring_process_mb": [round(rss[small]["peak_rss_mb"], 1), round(rss[large]["peak_rss_mb"], 1)],
        "process_tree_mb": [round(rss[small]["peak_tree_rss_mb"], 1), round(rss[large]["peak_tree_rss_mb"], 1)],
        "growth_mb": round(rss[large]["peak_tree_rss_mb"] - rss[small]["peak_tree_rss_mb"], 1),
    }
    result["large_rows"] = large
    result["large_seconds"] = round(rss[large]["seconds"], 2)
    result["score_vs_runtime_large"] = round(large / result["runtime_texts_per_s"] / rss[large]["seconds"], 3)

    say(f"Dask, two local workers, against local scoring: {dask_texts:,} texts …")
    table = pa.table({"id": list(range(dask_texts)), "text": [pool[i % len(pool)] for i in range(dask_texts)]})
    source = work / "dask-in.parquet"
    pq.write_table(table, source, row_group_size=max(dask_texts // 8, 1))
    local = run_score([str(source), "--out", str(work / "local-out.parquet"), *common])
    result["dask"] = _dask(work, registry, source, local["seconds"])
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--texts", type=int, default=100_000)
    parser.add_argument("--rss-rows", type=int, nargs=2, default=(10_000, 1_000_000))
    parser.add_argument("--dask-texts", type=int, default=100_000)
    parser.add_argument("--bundle", type=Path, help="score this bundle instead of the bench's demo model")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    load = os.getloadavg()
    result = bench_score(
        demo_model.CACHE / "score-work",
        bundle=args.bundle,
        texts=args.texts,
        rss_rows=tuple(args.rss_rows),
        dask_texts=args.dask_texts,
    )
    result["load_average_before"] = [round(x, 2) for x in load]
    result["load_average_after"] = [round(x, 2) for x in os.getloadavg()]
    result["bench_seconds"] = round(time.perf_counter() - started, 1)
    print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
