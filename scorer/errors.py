"""The one error type for expected bad input."""


class LimenError(Exception):
    """Expected bad input (a malformed file, a missing option, an image that cannot be used).

    The message names the file (or option) and the problem on one line.  The CLI
    prints it as ``error: <message>`` and exits with status 2; the web app shows
    it in the page.  Anything else that escapes is a bug and keeps its traceback.
    """

    def __init__(self, message: str, path: object | None = None):
        self.path = None if path is None else str(path)
        text = " ".join(str(message).split())  # always one line
        if self.path and not text.startswith(self.path):
            text = f"{self.path}: {text}"
        super().__init__(text)
