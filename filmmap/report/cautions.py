"""The cautions text: one constant, shown by the HTML and PDF reports (and later the CLI).

Keep every user-facing copy of the cautions pointing here, so that the report,
the PDF and the command line never drift apart.
"""

from __future__ import annotations

#: Title shown above the cautions.
CAUTIONS_TITLE = "Cautions"

#: The cautions, one paragraph per entry (plain text, no markup).
CAUTION_PARAGRAPHS = (
    "Advisory only. filmmap never drives equipment: it reads measurements and prints "
    "numbers and suggestions, nothing more.",
    "Every recipe change and every heater-zone change it suggests must be reviewed and "
    "approved by the process owner, stay within the furnace's qualified limits, and go "
    "through your site's safety rules and change-control procedure. Those rules and "
    "procedures always take precedence over anything filmmap prints.",
    "Hazards: furnace tubes run above 1000 °C; steam and pyrogenic H2-O2 torches (hydrogen) "
    "are in use; HF and its residues on cleaned wafers are dangerous. Follow your local "
    "training, personal protective equipment (PPE) rules and interlocks.",
)

#: The cautions as one plain-text block (paragraphs separated by a blank line).
CAUTIONS = "\n\n".join(CAUTION_PARAGRAPHS)

__all__ = ["CAUTIONS", "CAUTION_PARAGRAPHS", "CAUTIONS_TITLE"]
