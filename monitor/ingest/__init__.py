"""`cuewatch ingest`: append decision and outcome files to the store, quarantining bad rows."""

from monitor.ingest.batches import IngestSummary, ingest

__all__ = ["IngestSummary", "ingest"]
