"""Colours of the report: the Okabe–Ito palette (safe for the common colour-vision deficiencies).

Segments cycle through the seven chromatic Okabe–Ito colours, so neighbouring images in a row never
share a colour; padding is a pale neutral grey that is none of them. Everything is RGB uint8.
"""

from __future__ import annotations

# The eight Okabe–Ito colours.
BLACK = (0, 0, 0)
ORANGE = (230, 159, 0)
SKY_BLUE = (86, 180, 233)
BLUISH_GREEN = (0, 158, 115)
YELLOW = (240, 228, 66)
BLUE = (0, 114, 178)
VERMILLION = (213, 94, 0)
REDDISH_PURPLE = (204, 121, 167)

#: Segment k (1-based) of a packed row gets SEGMENTS[(k - 1) % 7].
SEGMENTS = (ORANGE, SKY_BLUE, BLUISH_GREEN, YELLOW, BLUE, VERMILLION, REDDISH_PURPLE)
#: Padding tokens in a segment strip.
PADDING = (224, 224, 224)
#: Patch-grid lines drawn over a resized image.
GRID = BLUE
#: Dropped patches are blended towards this colour.
SHADE = BLACK
#: Masked (hidden, but still sent) patches are hatched in this colour.
HATCH = VERMILLION
#: The source crop drawn on the original.
CROP = REDDISH_PURPLE
#: Cells of a reconstructed image that no token fills.
EMPTY = (128, 128, 128)
#: Background behind composed pictures.
BACKGROUND = (255, 255, 255)


def segment_colour(segment: int) -> tuple[int, int, int]:
    """Colour of segment id `segment` (0 is padding)."""
    if segment <= 0:
        return PADDING
    return SEGMENTS[(segment - 1) % len(SEGMENTS)]


def hex_colour(rgb: tuple[int, int, int]) -> str:
    return "#{:02x}{:02x}{:02x}".format(*rgb)
