"""cdcnorm: typed, ordered upsert/delete envelopes from raw CDC dumps, and column lineage."""

__version__ = "0.1.0"
