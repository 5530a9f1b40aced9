"""The records the report's drawing functions return, and the page's SVG id counter.

Kept apart from :mod:`.figures` (which imports matplotlib) and :mod:`.figure_store`
(which calls :mod:`.figures`), so that stored figures read back without matplotlib and
no two of these modules import each other.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from markupsafe import Markup


@dataclass
class Rendered:
    """One figure, ready to place in the page."""

    html: Markup
    kind: str          # "svg" or "png"
    size: int          # bytes of markup

    def __html__(self) -> str:  # lets the template print it directly
        return str(self.html)


@dataclass
class Lineup:
    panels: list[Rendered]      # 20 small histograms, in reading order
    answer: int                 # 1-based position of the observed data
    replicate_rows: list[int]   # rows of y_rep_sample used, in panel order (observed skipped)
    edges: np.ndarray           # the bins shared by every panel
    counts: list[np.ndarray]    # the histogram of each panel, in reading order


# --- SVG ids ------------------------------------------------------------------------------

#: Number of the next figure's SVG id prefix (``f1-``, ``f2-``, ...), unique in a page.
NEXT_ID = [1]


def next_prefix() -> str:
    """The id prefix of the next SVG figure drawn in this process."""
    number = NEXT_ID[0]
    NEXT_ID[0] += 1
    return f"f{number}-"
