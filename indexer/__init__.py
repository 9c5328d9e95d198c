"""sounding's indexer: loads, chunks and embeds documents and owns the on-disk index."""

__version__ = "0.1.0"
