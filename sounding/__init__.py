"""sounding: local semantic search over a team's internal documents.

One installed package with three parts, each kept in its own folder of the
repository (``pyproject.toml`` maps them with setuptools' ``package-dir``):

    sounding.indexer   indexer/    loaders, chunking, encoder, the on-disk index
                                   and everything that writes it; ranking and evaluation
    sounding.service   service/    the HTTP service that reads the index
    sounding.cli       sounding/cli/  the ``sounding`` command

Imports point one way: ``cli`` -> ``service`` -> ``indexer``; the indexer never
imports the service or the web stack (``tests/unit/test_boundaries.py``).
"""

__version__ = "0.1.0"
