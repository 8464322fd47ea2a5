"""Inference: micro-batching, worker processes, packing texts into graph calls, and spans."""
