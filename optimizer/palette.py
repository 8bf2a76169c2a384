"""stagefit's plot palette and marker shapes, for every plot and the browser pages.

Chosen to stay apart for colour-blind readers and in greyscale: each role differs from the
others in lightness as well as hue, and the scatter roles differ in marker shape too, so a
figure printed in black and white still reads. Hues from the colour-blind-safe set of
Okabe and Ito (2008, "Color Universal Design"), with our own dark aubergine for the lines
that matter most; the lightness order (darkest first) is front/model, limit, feasible,
infeasible, chosen.
"""
from __future__ import annotations

#: role -> colour (hex sRGB)
COLOURS: dict[str, str] = {
    "front": "#3b1f4f",       # dark aubergine: the Pareto front, the line a reader follows
    "model": "#3b1f4f",       # the model's curve in the response and transfer plots
    "limit": "#d55e00",       # vermilion: the stage's own limits (corners, clip levels)
    "feasible": "#009e73",    # bluish green: designs that meet every limit
    "infeasible": "#e69f00",  # orange, light: designs that miss a limit
    "chosen": "#f0e442",      # yellow with a black edge: the design the plot is about
    "band": "#56b4e9",        # sky blue, as a light fill: the spec's band
    "spec": "#009e73",        # the spec's own requirement lines
    "ideal": "#6b6b6b",       # mid grey, dotted or dashed: the ideal / reference
}

#: role -> matplotlib marker shape
MARKERS: dict[str, str] = {"feasible": "o", "infeasible": "x", "front": "D", "chosen": "*", "limit": "s"}


def css_variables() -> str:
    """The palette as CSS custom properties (``--sf-front: #3b1f4f; ...``) for browser pages."""
    return " ".join(f"--sf-{role}: {colour};" for role, colour in COLOURS.items())
