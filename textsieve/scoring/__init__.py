"""textsieve.scoring: score whole files with a registered model, on every core of one machine or on
the workers of a Dask cluster.

- :mod:`~textsieve.scoring.formats`: chunked readers and writers for JSONL, CSV and Parquet.
- :mod:`~textsieve.scoring.columns`: the output's columns, named so they never collide with the input's.
- :mod:`~textsieve.scoring.pool`: worker processes, one single-thread onnxruntime session each.
- :mod:`~textsieve.scoring.local`: the streaming run (temporary output, resume state, atomic rename).
- :mod:`~textsieve.scoring.cluster`: the same rows scored on Dask workers into a Parquet dataset.
- :mod:`~textsieve.scoring.model`: the loaded model behind the public Python API (``textsieve.load_model``).
- :mod:`~textsieve.scoring.cli`: the ``textsieve score`` verb.

Sits beside the exporter and the service over the registry: it imports neither, and never torch.
"""
