"""`cuewatch export`: the quarterly audit pack as of a moment."""

from monitor.audit.pack import export

__all__ = ["export"]
