"""The cautions the reports show, from the one cautions module (`filmmap.cautions`).

The text lives in `filmmap.cautions`, with every other caution filmmap shows (advice,
console, history page), so that the reports, the PDF and the command line never drift
apart; this module only gives the report layer its names.
"""

from __future__ import annotations

from filmmap.cautions import (CAUTION_PARAGRAPHS, CAUTIONS, CAUTIONS_TITLE,
                              CONTROL_CHART_CAUTION, SHORT_CAUTION)

__all__ = ["CAUTIONS", "CAUTION_PARAGRAPHS", "CAUTIONS_TITLE", "CONTROL_CHART_CAUTION",
           "SHORT_CAUTION"]
