"""The numbers in the plans' sentences, as people read them."""

from __future__ import annotations

import numpy as np


def amount(x: float, units: str) -> str:
    """Three significant figures, thousands grouped, with the units."""
    if abs(x) >= 1000:
        text = f"{round(float(f'{x:.3g}')):,}"
    else:
        text = np.format_float_positional(x, precision=3, unique=False, fractional=False)
        text = text.rstrip("0").rstrip(".") if "." in text else text
    return f"{text} {units}" if units else text


def percent(power: float) -> str:
    return f"{100 * power:.3g} %"


def plural(word: str) -> str:
    return word if word.endswith("s") else f"{word}s"


def counted(k: int, word: str) -> str:
    return f"{k:,} {word if k == 1 else plural(word)}"
