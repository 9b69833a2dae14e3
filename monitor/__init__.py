"""cuewatch: a streaming decision-audit monitor for operational judgment logs."""

__version__ = "0.1.0"
