"""stagefit's own colours, shared by the plots (optimizer/plots.py) and the browser pages
(api/pages.py serves them as CSS custom properties).

Chosen to stay apart under the common colour-vision deficiencies: the two data hues are a
deep teal and a burnt ochre (they differ in lightness as well as hue, so they also part in
grey-scale print), with plum as a third; feasible and infeasible designs are told apart by
marker shape as well. Every text colour reaches a WCAG 2.x contrast ratio of at least 4.5:1
on ``paper`` and ``panel`` (tests/test_pages.py computes it).
"""

from __future__ import annotations

#: name -> sRGB hex
PALETTE: dict[str, str] = {
    "ink": "#1b2226",  # body text
    "muted": "#4b565c",  # secondary text, axis labels
    "paper": "#fbfaf5",  # page background
    "panel": "#eef0ea",  # table stripes, boxes
    "rule": "#b9c0bb",  # lines, borders (not text)
    "teal": "#00666b",  # links, feasible designs, the model's curves
    "ochre": "#9c4a00",  # infeasible designs, limits, errors
    "plum": "#5d3a86",  # the Pareto front, spec lines
    "amber": "#e3a21a",  # the chosen design, highlights (fill only, never text)
    "mist": "#fbe9bd",  # background of highlighted differences
    "sage": "#8fb9a8",  # the pass band (fill only)
    "aubergine": "#3b1f4f",  # the Pareto front and the model's curves in plots (darkest plot role)
    "orange": "#e69f00",  # infeasible designs in plots (light: apart from teal in grey-scale too)
    "yellow": "#f0e442",  # the chosen design in plots (lightest, drawn with a dark edge)
}

#: what each plot element is drawn in (keys used by optimizer/plots.py)
#: (the scatter roles front < feasible < infeasible < chosen rise in lightness, so a grey-scale
#: print keeps them apart; they differ in marker shape as well)
PLOT_COLOURS: dict[str, str] = {
    "feasible": PALETTE["teal"],
    "infeasible": PALETTE["orange"],
    "front": PALETTE["aubergine"],
    "chosen": PALETTE["yellow"],
    "band": PALETTE["sage"],
    "model": PALETTE["aubergine"],
    "ideal": PALETTE["muted"],
    "limit": PALETTE["ochre"],
    "spec": PALETTE["plum"],
}

#: plot role -> matplotlib marker shape
MARKERS: dict[str, str] = {"feasible": "o", "infeasible": "x", "front": "D", "chosen": "*", "limit": "s"}

#: text colours and the backgrounds they are set on in the pages
TEXT_PAIRS: tuple[tuple[str, str], ...] = (
    ("ink", "paper"),
    ("ink", "panel"),
    ("ink", "mist"),
    ("muted", "paper"),
    ("muted", "panel"),
    ("teal", "paper"),
    ("teal", "panel"),
    ("ochre", "paper"),
    ("ochre", "panel"),
    ("ochre", "mist"),
    ("plum", "paper"),
    ("paper", "teal"),
)


def css_variables() -> str:
    """The palette as a CSS ``:root`` block (``--ink``, ``--teal``, ...)."""
    body = "".join(f"--{name}:{value};" for name, value in PALETTE.items())
    return f":root{{{body}}}\n"
