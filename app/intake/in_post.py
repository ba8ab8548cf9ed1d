"""Which reason codes say the executive has not left: a row with such a code and no departure date is a
still-in-post row, accepted at import but no departure of any year (Coverage counts them apart)."""

from __future__ import annotations

import re

# Common practice in roster compilation (not a standard): a roster lists the sitting chief beside the
# departures, with no exit date and a reason such as "still in post" or "incumbent".
_STILL_IN_POST = re.compile(
    r"still\s+(?:in\s+(?:post|office|role)|serving|there)|incumbent|\bserving\b|\bin\s+(?:office|post)\b"
    r"|currently\s+(?:ceo|in)",
    re.IGNORECASE,
)


def is_still_in_post(reason: str) -> bool:
    """True when a reason code says the executive has not left ("still in post", "incumbent", ...)."""
    return bool(_STILL_IN_POST.search(reason))
