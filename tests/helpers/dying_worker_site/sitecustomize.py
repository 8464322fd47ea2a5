"""Put on ``PYTHONPATH`` by a test, so that every process a ``textsieve score`` command starts (its
fork server and so its workers) runs ``tests.helpers.dying_worker.install`` (Python imports
``sitecustomize`` at start-up: the ``site`` module's documentation)."""

from tests.helpers.dying_worker import install

install()
