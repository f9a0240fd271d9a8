"""Every caution filmmap shows, in one place: the advice, the reports, the console, the history.

filmmap advises; it never drives equipment.  Each place that says so takes its words from
here, so that advice.json, report.html, report.pdf, history.html and the command line
never drift apart.  This module sits in the foundation layer (plain text, no imports)
because the lowest layer that needs a caution is the growth model's advice;
`filmmap.report.cautions` re-exports the ones the reports show.

The advice's text (`ADVICE_CAUTION`) is pinned: advice.json carries it under the key
``caution``.
"""

from __future__ import annotations

__all__ = ["ADVICE_CAUTION", "CAUTIONS", "CAUTIONS_TITLE", "CAUTION_PARAGRAPHS",
           "CONSOLE_CAUTION", "CONTROL_CHART_CAUTION", "SHORT_CAUTION"]

#: Attached to every advice under the key ``"caution"`` (advice.json; pinned text).
ADVICE_CAUTION = ("Advisory only: these time and zone-offset changes come from a growth model "
                  "fitted to one lot. They must be reviewed and approved by the process owner, "
                  "within the furnace's qualified limits and under the site's safety and "
                  "change-control rules, before any run uses them.")

#: Printed by the command line after any advice, plan or run-to-run estimate.
CONSOLE_CAUTION = ("filmmap advises; it never drives equipment. Any recipe or zone change is "
                   "for the process owner to approve, within the furnace's qualified limits "
                   "and local safety rules.")

#: On the history page (control charts and the run-to-run estimate).
CONTROL_CHART_CAUTION = ("Control charts and run-to-run estimates are advisory. A signal asks "
                         "for the cause to be found; any recipe or zone change is for the "
                         "process owner to approve, within the furnace's qualified limits and "
                         "local safety rules.")

#: The one-line caution under the action of a report's decision block.
SHORT_CAUTION = ("Advisory only: any recipe or heater-zone change needs the process owner's "
                 "approval, within the furnace's qualified limits (see the cautions).")

#: Title shown above the reports' cautions.
CAUTIONS_TITLE = "Cautions"

#: The reports' cautions, one paragraph per entry (plain text, no markup).
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

#: The reports' cautions as one plain-text block (paragraphs separated by a blank line).
CAUTIONS = "\n\n".join(CAUTION_PARAGRAPHS)
