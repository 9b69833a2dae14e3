"""The caution that goes with every forbidden-cue figure, wherever it is shown.

One sentence set, used by the command line, the alert notifications, the dashboard and
the audit pack, so that no screen or file says less than the others.
"""

from __future__ import annotations

import textwrap

CAUTION = (
    "A weight on a forbidden cue is a statistical association in observational data, "
    "not proof of intent or of unlawful treatment. Cues the model does not see, outcomes "
    "recorded only for some cases (only investigated cases get a verdict), small samples "
    "and chance all matter. Read every figure with its sample size, and defer to your "
    "compliance and legal advisers and the law that applies where you operate."
)


# Where the figures of a 0/1 judgment appear: what kind of model they come from.
LINEAR_PROBABILITY_NOTE = (
    "The judgment is 0/1: weights, R_s and the lens figures come from a linear probability "
    "model (ordinary least squares on the 0/1 judgment); the audit pack adds a logistic fit."
)
# Where environment-side figures (R_e, r_a, G, C, validities) appear.
LINKED_OUTCOMES_NOTE = (
    "R_e, r_a, G, C and the validities rest on the decisions whose outcome has arrived so "
    "far (n_linked of n): a subset that may be selected (for example, only investigated "
    "cases get a verdict), so they can change as more outcomes arrive."
)


def caution_lines(width: int = 86, indent: str = "  ") -> list[str]:
    """``CAUTION`` wrapped for a plain-text report: a "- " bullet, then ``indent``."""
    return textwrap.wrap(CAUTION, width, initial_indent="- ", subsequent_indent=indent)
