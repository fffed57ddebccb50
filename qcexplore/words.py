"""Words for people that every layer may need: a count with its noun in the right number."""

from __future__ import annotations


def plural(count: int, word: str, words: str | None = None) -> str:
    """``count`` and the word in the right number (``words``: the plural when it is not
    the word with an s).

    Examples
    --------
    >>> plural(1, "finding"), plural(3, "finding"), plural(2, "index", "indices")
    ('1 finding', '3 findings', '2 indices')
    """
    return f"{count} {word if count == 1 else (words or word + 's')}"
