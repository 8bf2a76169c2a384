"""WCAG 2.x contrast ratio, for the pages' accessibility checks (tests/test_pages.py,
tests/test_browser.py)."""

from __future__ import annotations


def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.x relative luminance of an sRGB colour (W3C WCAG 2.2, definition 'relative
    luminance': linearise each channel, then 0.2126 R + 0.7152 G + 0.0722 B)."""
    channels = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
    r, g, b = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast_ratio(foreground: str, background: str) -> float:
    """WCAG 2.x contrast ratio (L1 + 0.05) / (L2 + 0.05), L1 the lighter (W3C WCAG 2.2,
    definition 'contrast ratio'; success criterion 1.4.3 asks 4.5:1 for body text)."""
    high, low = sorted((relative_luminance(foreground), relative_luminance(background)), reverse=True)
    return (high + 0.05) / (low + 0.05)
