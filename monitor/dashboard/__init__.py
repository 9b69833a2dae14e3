"""`cuewatch dashboard`: the data the pages read, and the server process that shows them."""

from monitor.dashboard.start import launch

__all__ = ["launch"]
