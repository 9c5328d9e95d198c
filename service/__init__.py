"""sounding's REST service: reads the index the indexer writes and answers queries."""
