"""The baseline: a deliberately plain FastAPI app running the PyTorch model per request.

This is what a team writes by hand around a trained model, and it is kept that way on
purpose: a synchronous endpoint (FastAPI runs it in its thread pool), a pydantic request
model, one ``model(ids, lengths)`` call per request on that request's texts padded to their
longest, PyTorch's default threads, a dict reply through FastAPI's default JSON encoder and
uvicorn's defaults. It uses the run's own tokenizer, vocabulary and temperature, so its
labels and probabilities match the service's; it returns no spans (less work than the
service does).

    python bench/torch_wrapper.py --run RUN_DIR --port 8123 [--temperature T]
"""

from __future__ import annotations

import argparse
from pathlib import Path

import torch
import uvicorn
from fastapi import FastAPI
from pydantic import BaseModel

from textsieve.exporter.run_folder import load_run
from textsieve.registry.tokenizer import Tokenizer


class PredictIn(BaseModel):
    texts: list[str]
    spans: int = 0  # accepted so the same request bodies work; no spans are computed


def build_app(run_dir: Path, temperature: float = 1.0) -> FastAPI:
    model, vocab, run = load_run(run_dir)
    model.eval()
    labels = run.labels
    max_length = run.lengths.max_length
    min_length = run.lengths.min_length
    tokenizer = Tokenizer()
    app = FastAPI()

    @app.get("/healthz")
    def healthz() -> dict[str, str]:
        return {"status": "ok"}

    @app.post("/v1/predict")
    def predict(req: PredictIn) -> dict[str, object]:
        ids = [vocab.encode(tokenizer.split(t)[0][:max_length]) for t in req.texts]
        width = max(max(len(x) for x in ids), min_length)
        batch = torch.zeros((len(ids), width), dtype=torch.long)
        for i, row in enumerate(ids):
            batch[i, : len(row)] = torch.tensor(row, dtype=torch.long)
        lengths = torch.tensor([len(x) for x in ids], dtype=torch.long)
        with torch.no_grad():
            probs = torch.softmax(model(batch, lengths) / temperature, dim=1)
        results = []
        for row in probs.tolist():
            best = max(range(len(row)), key=row.__getitem__)
            results.append({"label": labels[best], "probabilities": dict(zip(labels, row, strict=True))})
        return {"results": results}

    return app


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--run", type=Path, required=True)
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, default=8123)
    parser.add_argument("--temperature", type=float, default=1.0)
    args = parser.parse_args()
    uvicorn.run(build_app(args.run, args.temperature), host=args.host, port=args.port)


if __name__ == "__main__":
    main()
