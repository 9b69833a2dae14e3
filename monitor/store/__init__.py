"""The DuckDB store: connection rules (``connection``), the one schema (``schema``) and
the relational rules the stages share (``rules``)."""

from monitor.store.connection import Store

__all__ = ["Store"]
