"""The one colour palette probeseq uses in every figure.

The colours are the eight-colour colour-blind-safe set published by Okabe and Ito (2008,
"Color Universal Design", https://jfly.uni-koeln.de/color/), in an order chosen for this
project: metals take the first colours in the order the user lists them, so a metal keeps its
colour across every figure of a run. ``OTHER`` and ``UNRANGED`` are the greys used for non-metal
and unranged ions.
"""


__all__ = ['METAL_COLOURS', 'OTHER', 'UNRANGED', 'EMPTY', 'metal_colour', 'metal_colours']

# Okabe-Ito: blue, vermillion, bluish green, orange, reddish purple, sky blue, yellow, black.
METAL_COLOURS = (
    "#0072B2",
    "#D55E00",
    "#009E73",
    "#E69F00",
    "#CC79A7",
    "#56B4E9",
    "#F0E442",
    "#000000",
)


OTHER = "#999999"


UNRANGED = "#DDDDDD"


EMPTY = "#FFFFFF"


def metal_colour(index: int) -> str:
    """Colour of the metal at position ``index`` in the run's metal list."""
    return METAL_COLOURS[index % len(METAL_COLOURS)]


def metal_colours(metals) -> dict:
    """Mapping metal symbol -> colour, in the order given."""
    return {m: metal_colour(i) for i, m in enumerate(metals)}
