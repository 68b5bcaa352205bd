"""The one error type for expected bad input."""

#: a word (a path, a name) longer than this is shortened in an error message: never echoed whole
MAX_WORD_CHARS = 200


def short_text(value: object, limit: int = MAX_WORD_CHARS) -> str:
    """``value`` as text for a one-line message: whitespace runs folded to one space, and text longer than
    ``limit`` characters cut to its start and end with the length said (a 100 000-character name is never
    echoed whole)."""
    text = " ".join(str(value).split())
    if len(text) <= limit:
        return text
    head, tail = (limit * 2) // 3, limit // 6
    return f"{text[:head]}…{text[-tail:]} ({len(text)} characters)"


def plain_value(value: object) -> str:
    """A value read from a table as a message shows it: numbers plainly (``0.5``, never ``np.float64(0.5)``),
    text quoted, both shortened (:func:`short_text`)."""
    item = getattr(value, "item", None)
    if callable(item) and type(value).__module__ == "numpy":
        value = item()
    if isinstance(value, bool) or value is None:
        return str(value)
    if isinstance(value, (int, float)):
        return f"{value:g}" if isinstance(value, float) else str(value)
    return short_text(repr(str(value)), 80)


class LimenError(Exception):
    """Expected bad input (a malformed file, a missing option, an image that cannot be used).

    The message names the file (or option) and the problem on one line.  The CLI
    prints it as ``error: <message>`` and exits with status 2; the web app shows
    it in the page.  Anything else that escapes is a bug and keeps its traceback.
    A word of the message longer than :data:`MAX_WORD_CHARS` (a huge file name or label) is shortened
    (:func:`short_text`); ``path`` keeps the whole name.
    """

    def __init__(self, message: str, path: object | None = None) -> None:
        self.path = None if path is None else str(path)
        text = " ".join(str(message).split())  # always one line
        if self.path and not text.startswith(self.path):
            text = f"{self.path}: {text}"
        super().__init__(" ".join(short_text(w) for w in text.split(" ")))
