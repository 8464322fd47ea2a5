"""``textsieve train``: a labelled file in, a run folder out.

The recipe is Kim (2014, "Convolutional Neural Networks for Sentence Classification", EMNLP):
word embeddings, filters of several widths, ReLU, max-over-time pooling, dropout, a max-norm
constraint on the output layer, early stopping on validation. Training is seeded and, on one
machine, bit-for-bit reproducible.

    check the config → check --out → prepare the data → fit → describe the run → write the folder
"""

from __future__ import annotations

from pathlib import Path

from textsieve import __version__
from textsieve.exporter.config import TrainConfig
from textsieve.exporter.fit import Fitted, fit
from textsieve.exporter.prepare import Prepared, prepare
from textsieve.exporter.run_folder import RunInfo, RunTraining, RunVocabulary, check_out, write_run
from textsieve.files import sha256_file
from textsieve.registry.manifest import ArchitectureInfo, VectorsInfo
from textsieve.registry.tokenizer import TokenizerSpec


def train(config: TrainConfig) -> Path:
    """Train a model as configured and write its run folder; returns the folder."""
    config.check()
    check_out(config.out)  # before the training, not only after it: a bad --out should not cost minutes
    prep = prepare(config)
    fitted = fit(config, prep)
    write_run(
        config.out, describe_run(config, prep, fitted), fitted.state, prep.vocabulary, prep.valid, start=prep.vectors
    )
    return config.out


def describe_run(config: TrainConfig, prep: Prepared, fitted: Fitted) -> RunInfo:
    """run.json: what the exporter needs to rebuild the model and what the bundle's manifest records."""
    vectors = None
    if prep.vectors is not None and config.vectors is not None:
        vectors = VectorsInfo(
            file_sha256=sha256_file(config.vectors),
            dim=prep.vectors.dim,
            found=prep.vectors.found,
            mode=config.vectors_mode,
        )
    architecture = ArchitectureInfo(
        embedding_dim=prep.embedding_dim,
        widths=list(config.widths),
        maps=config.maps,
        dropout=config.dropout,
        max_norm=config.max_norm,
        vectors=vectors,
    )
    training = RunTraining(
        data_sha256=sha256_file(config.data),
        valid_sha256=sha256_file(config.valid) if config.valid is not None else None,
        rows=len(prep.train),
        valid_rows=len(prep.valid),
        seed=config.seed,
        epochs=len(fitted.history),
        best_epoch=fitted.best_epoch,
        batch_size=config.batch_size,
        learning_rate=config.learning_rate,
        text_field=config.text_field,
        label_field=config.label_field,
        history=fitted.history,
    )
    return RunInfo(
        labels=prep.labels,
        tokenizer=TokenizerSpec(),
        vocabulary=RunVocabulary(size=len(prep.vocabulary), min_count=config.min_count, max_size=config.max_vocab),
        lengths=prep.lengths,
        architecture=architecture,
        training=training,
        tool_version=__version__,
    )


__all__ = ["TrainConfig", "describe_run", "train"]
