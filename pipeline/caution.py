"""The caution every user-facing output opens with (README, CLI summary, report)."""

CAUTION = (
    "CAUTION: screening-level results for decision support; not a substitute for a site-specific "
    "study by a licensed professional. Local building codes and the authority having jurisdiction "
    "govern design."
)
