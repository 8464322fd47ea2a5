"""The arithmetic limit: convolution FLOPs per text over a measured float32 matrix-multiply rate.

A width-w filter bank over a text of T tokens computes maps × (T − w + 1) dot products of
length w·dim, each 2·w·dim FLOPs (one multiply and one add per term), so one text costs
2·maps·dim·Σ_w w·(T − w + 1) FLOPs; embedding lookup, pooling and the output layer are
negligible beside it. T is the text's own length (at least the widest filter, the graph's
minimum): the work any implementation must do, without padding.

The rate is the faster of two measurements, each in its own subprocess (float32, 2048²
operands, 2 threads, best of several runs), so the limit is never understated:
- NumPy's OpenBLAS, with OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE removed from that subprocess's
  environment only (some machines here set them to force an older kernel, which slows a current
  OpenBLAS; see the workplace notes); threadpoolctl reports which kernel actually ran;
- PyTorch's ``torch.mm`` (its bundled BLAS), 2 intra-op threads.
On the 2-core AMD EPYC this was written on, OpenBLAS's SkylakeX (AVX-512) kernel was about
twice as fast as torch.mm, so it sets the limit there.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections.abc import Sequence


def conv_flops(length: int, *, dim: int, maps: int, widths: Sequence[int], min_length: int) -> int:
    t = max(length, min_length)
    return 2 * maps * dim * sum(w * max(t - w + 1, 0) for w in widths)


def mean_conv_flops(lengths: Sequence[int], *, dim: int, maps: int, widths: Sequence[int], min_length: int) -> float:
    total = sum(conv_flops(n, dim=dim, maps=maps, widths=widths, min_length=min_length) for n in lengths)
    return total / max(len(lengths), 1)


_RATE_SCRIPT = r"""
import json, sys, time
import torch
torch.set_num_threads(int(sys.argv[1]))
n = int(sys.argv[2])
a = torch.randn(n, n, dtype=torch.float32)
b = torch.randn(n, n, dtype=torch.float32)
c = torch.empty(n, n, dtype=torch.float32)
for _ in range(3):
    torch.mm(a, b, out=c)
best = float("inf")
for _ in range(int(sys.argv[3])):
    t = time.perf_counter()
    for _ in range(4):
        torch.mm(a, b, out=c)
    best = min(best, (time.perf_counter() - t) / 4)
print(json.dumps({"gflops": 2 * n ** 3 / best / 1e9, "threads": torch.get_num_threads(), "n": n,
                  "torch": torch.__version__, "backend": "MKL" if torch.backends.mkl.is_available() else "other"}))
"""


_NUMPY_SCRIPT = r"""
import json, sys, time
import numpy as np
threads, n, repeats = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3])
try:
    from threadpoolctl import threadpool_info, threadpool_limits
except ImportError:
    threadpool_info = None
rng = np.random.default_rng(0)
a = rng.random((n, n), dtype=np.float32)
b = rng.random((n, n), dtype=np.float32)
c = np.empty((n, n), dtype=np.float32)
def measure():
    for _ in range(3):
        np.matmul(a, b, out=c)
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        for _ in range(4):
            np.matmul(a, b, out=c)
        best = min(best, (time.perf_counter() - t) / 4)
    return best
if threadpool_info is not None:
    with threadpool_limits(threads):
        best = measure()
        blas = [{k: i.get(k) for k in ("internal_api", "version", "architecture", "num_threads")}
                for i in threadpool_info() if i.get("user_api") == "blas"]
else:
    best, blas = measure(), "threadpoolctl missing: threads not pinned, kernel unknown"
print(json.dumps({"gflops": 2 * n ** 3 / best / 1e9, "numpy": np.__version__, "blas": blas, "n": n}))
"""


def _run(script: str, threads: int, n: int, repeats: int, env: dict[str, str]) -> dict[str, object]:
    out = subprocess.run(
        [sys.executable, "-c", script, str(threads), str(n), str(repeats)],
        check=True,
        capture_output=True,
        text=True,
        timeout=300,
        env=env,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def matmul_rate(threads: int = 2, n: int = 2048, repeats: int = 20) -> dict[str, object]:
    """The faster of NumPy/OpenBLAS and torch float32 GEMM, GFLOP/s with ``threads`` threads."""
    clean = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")}
    clean["OPENBLAS_NUM_THREADS"] = str(threads)
    found: dict[str, dict[str, object]] = {"numpy": _run(_NUMPY_SCRIPT, threads, n, repeats, clean)}
    try:
        found["torch"] = _run(_RATE_SCRIPT, threads, n, repeats, dict(os.environ))
    except subprocess.CalledProcessError:  # a serving-only install has no torch
        pass
    source = max(found, key=lambda k: float(found[k]["gflops"]))  # type: ignore[arg-type]
    return {
        "gflops": float(found[source]["gflops"]),
        "threads": threads,
        "source": source,  # type: ignore[arg-type]
        "measured": found,
    }


if __name__ == "__main__":
    print(matmul_rate())
