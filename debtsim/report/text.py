"""Words the reader sees, defined once: the caution and the names of things.

Every page, ``summary.json``, the command line and the README use these
constants, so a change of wording happens in one place (a test checks that
the README quotes :data:`CAUTION` word for word).
"""

from __future__ import annotations

__all__ = [
    "CAUTION",
    "LINKED_GROUP",
    "LOSS_DISTRIBUTION",
    "PD_WITH_CONTAGION",
    "WITH_LINKS",
    "WITHOUT_LINKS",
    "WITHOUT_LINKS_HEADING",
    "WITHOUT_LINKS_SHORT",
]

#: The caution printed at the top of every page, by every command that writes a report, in
#: ``summary.json`` and in the README.
CAUTION = (
    "These figures are model estimates under the stated assumptions, not investment, credit or "
    "regulatory advice. Capital used for any regulatory purpose must follow your supervisor's "
    "rules and your institution's approved methods."
)

#: The comparison every run carries: the same book with its links removed.
WITHOUT_LINKS = "without links (Gaussian copula)"
#: The same, at the start of a sentence or a column heading.
WITHOUT_LINKS_HEADING = "Without links (Gaussian copula)"
#: Short form where space is tight (chart legends), always after :data:`WITHOUT_LINKS` is shown.
WITHOUT_LINKS_SHORT = "without links"
#: The model itself: the linked factor model, contagion included.
WITH_LINKS = "with links"

#: The probability law of the portfolio loss (the trade's term).
LOSS_DISTRIBUTION = "loss distribution"

#: An obligor's default probability once defaults reaching it along links are counted.
PD_WITH_CONTAGION = "PD with contagion"

#: A set of obligors tied to each other by links (directly or through others).
LINKED_GROUP = "linked group"
