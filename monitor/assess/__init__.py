"""`cuewatch assess`: policy findings over the stored fits, the alert lifecycle, notifications."""

from monitor.assess.alerts import AssessSummary, assess

__all__ = ["AssessSummary", "assess"]
