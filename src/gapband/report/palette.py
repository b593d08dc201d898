"""gapband's report colours: told apart by colour-blind readers and in greyscale print.

Flag colours step down in lightness in the order of the flags (observed is
lightest, not filled darkest), so a greyscale print keeps them apart; the
two hues in the middle are a blue and an orange, a pair that the common
forms of colour blindness keep distinct.
"""

from __future__ import annotations

#: Fill colour of each flag meaning, in flag order.
FLAG_COLOURS: dict[str, str] = {
    "observed": "#E9E4D8",
    "filled": "#8CB9D9",
    "filled_uncertain": "#C66A1B",
    "not_filled": "#2E2140",
}
OBSERVED_POINT = "#222222"
MEDIAN_LINE = "#1F5F8B"
#: Interval bands from the widest (lightest) to the narrowest (darkest).
BAND_SHADES: tuple[str, ...] = ("#DCE9F3", "#BCD6EA", "#9CC2E0", "#7CAED6")
#: Lines of a few predictors or components: colour and a dash pattern, so
#: they stay apart without colour.
LINES: tuple[tuple[str, str, str], ...] = (
    ("#1F5F8B", "-", "o"),
    ("#C66A1B", "--", "s"),
    ("#5E4B8B", "-.", "^"),
    ("#4D4D4D", ":", "D"),
)
GRID = "#CCCCCC"
