"""The one base class for errors a user can cause and fix.

Every stage's user errors (bad configuration, a bad file, a busy store, a wrong
option) derive from ``UserError``; the command line catches this one type, prints the
message's first line and exits 2.  Anything else is a bug and stays an exception.
"""

from __future__ import annotations


class UserError(Exception):
    """A problem the user can fix; its message is one sentence naming what is wrong."""
