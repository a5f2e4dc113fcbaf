"""The colours of the report and the jobs page, derived from the Okabe–Ito hues of the plots.

Each text colour is one Okabe–Ito hue darkened (its sRGB channels scaled towards black, so the
hue stays) just until it reaches its contrast target against every background of the palette,
by the relative-luminance contrast ratio of WCAG 2.1 §1.4.3. Backgrounds and rules are light
tints of the same hues. ``service/static/index.html`` repeats these values in its ``:root``
block (a static file cannot import them); a test checks that the two agree.
"""
from __future__ import annotations

# Okabe & Ito, "Color Universal Design" (2008): the hues service/plots.py draws with.
OKABE_ITO = {"orange": "#E69F00", "sky_blue": "#56B4E9", "bluish_green": "#009E73",
             "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00",
             "reddish_purple": "#CC79A7", "black": "#000000"}

AA_NORMAL_TEXT = 4.5  # WCAG 2.1 §1.4.3, level AA, text below 18 pt
BODY_TEXT = 12.0  # long reading: the body ink is kept far darker than the minimum


def _rgb(colour: str) -> tuple[int, int, int]:
    text = colour.lstrip("#")
    if len(text) != 6:
        raise ValueError(f"colour {colour!r}: expected #rrggbb")
    return int(text[0:2], 16), int(text[2:4], 16), int(text[4:6], 16)


def _hex(rgb) -> str:
    return "#" + "".join(f"{round(c):02x}" for c in rgb)


def relative_luminance(colour: str) -> float:
    """WCAG 2.1 relative luminance of an sRGB ``#rrggbb`` colour (0 black … 1 white)."""
    def linear(c: int) -> float:
        c = c / 255
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (linear(c) for c in _rgb(colour))
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast_ratio(first: str, second: str) -> float:
    """(L_lighter + 0.05) / (L_darker + 0.05), from 1 (none) to 21 (black on white)."""
    a, b = sorted((relative_luminance(first), relative_luminance(second)), reverse=True)
    return (a + 0.05) / (b + 0.05)


def darken(colour: str, backgrounds, target: float = AA_NORMAL_TEXT) -> str:
    """``colour`` with its channels scaled down in 0.5 % steps until its contrast against each
    of ``backgrounds`` reaches ``target``; unchanged when it already does."""
    rgb = _rgb(colour)
    for step in range(201):
        candidate = _hex(c * (1 - step / 200) for c in rgb)
        if all(contrast_ratio(candidate, b) >= target for b in backgrounds):
            return candidate
    raise ValueError(f"{colour}: black does not reach {target}:1 on {backgrounds}")


def tint(colour: str, share: float) -> str:
    """``share`` of ``colour`` mixed into white (a light background or rule of that hue)."""
    return _hex(255 + share * (c - 255) for c in _rgb(colour))


PAPER = "#ffffff"
BACKGROUNDS = {
    "paper": PAPER,
    "band": tint(OKABE_ITO["sky_blue"], 0.08),  # navigation, table heads, notes
    "stripe": tint(OKABE_ITO["sky_blue"], 0.04),  # every other table row
    "warn_bg": tint(OKABE_ITO["vermillion"], 0.08),  # the warnings box
    "caution_bg": tint(OKABE_ITO["yellow"], 0.14),  # the cautions
}
LINES = {"line": tint(OKABE_ITO["sky_blue"], 0.30), "warn_line": tint(OKABE_ITO["vermillion"], 1.0),
         "caution_line": tint(OKABE_ITO["orange"], 0.8)}
_ON = tuple(BACKGROUNDS.values())
TEXT = {
    "ink": darken(OKABE_ITO["blue"], _ON, BODY_TEXT),
    "muted": darken(OKABE_ITO["sky_blue"], _ON),
    "accent": darken(OKABE_ITO["blue"], _ON),
    "ok": darken(OKABE_ITO["bluish_green"], _ON),
    "bad": darken(OKABE_ITO["vermillion"], _ON),
    "wait": darken(OKABE_ITO["orange"], _ON),
}
PALETTE = {**BACKGROUNDS, **LINES, **TEXT}


def css_variables() -> str:
    """The palette as one CSS ``:root`` rule of custom properties (``--warn-bg`` …)."""
    body = " ".join(f"--{name.replace('_', '-')}: {value};" for name, value in PALETTE.items())
    return f":root {{ {body} }}"
