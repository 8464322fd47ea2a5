"""Every ``POST /v1/predict`` reply body of a fixed set of requests, to compare two checkouts byte for byte.

    PYTHONPATH=<checkout> PYTHONSAFEPATH=1 .venv/bin/python bench/reply_bytes.py --out FILE

A change to how a worker writes its replies (bench/README.md, "Replies written without their
dicts") must leave every reply's bytes as they were. This serves the benchmarked model in-process
(``create_app`` and its lifespan, the predict lane), once with worker processes and once with
``TEXTSIEVE_INFERENCE=threads``, and sends the bench's texts in requests of 16 with 0, 1 and 3
spans, the same with the model's review threshold set (``needs_review`` in each result), and
texts that are hard for offsets and JSON: combining marks, emoji ZWJ sequences, right-to-left
text, quotes, backslashes and control characters, a lone surrogate (refused: 422). Each reply's
status and body (a problem's request id masked) go to ``--out`` as JSON lines; run it from both
checkouts and compare the files (``cmp``). The two ways of inference must give the same replies
too: it says whether they did.
"""

from __future__ import annotations

import argparse
import asyncio
import hashlib
import json
import os
import re
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
from texts import bench_texts  # noqa: E402

HARD = [
    "e\u0301te\u0301 cafe\u0301 the printer wont start",  # combining acute accents
    "👩\u200d👩\u200d👧 my laptop 👨🏽\u200d💻 screen is broken",  # ZWJ sequences, a skin-tone modifier
    "שלום the invoice עובד לא was charged twice",  # right-to-left words around left-to-right ones
    'a "quoted" back\\slash\ttab 100% refund \u2028 line separator',
    "  two  leading spaces, a newline\nand a trailing one ",
    "ﬁx the ＷＩＦＩ password ①②",  # compatibility characters NFKC folds
    "🇫🇷🇩🇪 flags " * 20,
    "x",
]
SURROGATE = "a lone \ud800 surrogate"
_REQUEST_ID = re.compile(rb'"request_id":"[0-9a-f]+"')


def requests() -> list[tuple[str, bytes]]:
    texts = bench_texts(960)
    out = []
    for spans in (0, 1, 3):
        for lo in range(0, len(texts), 16):
            out.append((f"bench spans={spans} [{lo}]", _body(texts[lo : lo + 16], spans)))
        out.append((f"hard spans={spans}", _body(HARD, spans)))
        for i, text in enumerate(HARD):
            out.append((f"hard[{i}] alone spans={spans}", _body([text], spans)))
    # json.dumps writes the lone surrogate as \ud800, which is how a client can send one
    out.append(("surrogate", json.dumps({"texts": [SURROGATE], "spans": 1}).encode()))
    return out


def _body(texts: list[str], spans: int) -> bytes:
    return json.dumps({"texts": texts, "spans": spans}, ensure_ascii=False).encode()


async def replies(registry: Path, inference: str) -> list[tuple[int, bytes]]:
    import httpx

    from textsieve.service.settings import load_settings
    from textsieve.service.web.app import create_app

    app = create_app(load_settings(host="127.0.0.1", port=1, registry=str(registry), inference=inference))
    got = []
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://bench", timeout=120) as client:
            while (await client.get("/readyz")).status_code != 200:
                await asyncio.sleep(0.1)
            for _, body in requests():
                r = await client.post("/v1/predict", content=body, headers={"content-type": "application/json"})
                # A problem's request id is new for every request: the rest of it must not change.
                got.append((r.status_code, _REQUEST_ID.sub(b'"request_id":"-"', r.content)))
    return got


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, required=True, help="JSON lines file: each request's status and body")
    args = parser.parse_args(argv)
    import textsieve
    from textsieve.registry import open_registry

    print(f"textsieve imported from {Path(textsieve.__file__).parent}")
    model = demo_model.ensure_model(lambda *a: None)
    folder = demo_model.CACHE / "work" / f"registry-reply-bytes-{os.getpid()}"
    registry = demo_model.live_registry(model, folder)
    names = [name for name, _ in requests()]
    lines = []
    by_inference: dict[str, list[tuple[int, bytes]]] = {}
    for review in (None, 0.9):
        if review is not None:
            with open_registry(registry) as reg:
                reg.change_settings(demo_model.MODEL_NAME, {"review_threshold": review}, reason="bench")
        for inference in ("processes", "threads"):
            got = asyncio.run(replies(registry, inference))
            by_inference[f"{inference} review={review}"] = got
            for name, (status, body) in zip(names, got, strict=True):
                lines.append(
                    {"inference": inference, "review": review, "request": name, "status": status, "body": body.decode()}
                )
    args.out.write_bytes(b"".join(json.dumps(line, ensure_ascii=False).encode() + b"\n" for line in lines))
    for review in (None, 0.9):
        same = by_inference[f"processes review={review}"] == by_inference[f"threads review={review}"]
        print(f"review threshold {review}: processes and threads {'equal' if same else 'DIFFER'}")
    statuses: dict[int, int] = {}
    for line in lines:
        statuses[int(line["status"])] = statuses.get(int(line["status"]), 0) + 1
    print(f"{len(lines)} replies {statuses}, sha256 {hashlib.sha256(args.out.read_bytes()).hexdigest()} ({args.out})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
