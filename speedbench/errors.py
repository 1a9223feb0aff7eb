"""The one exception type for user mistakes.

Anything the user can fix (a bad path, a wrong profile key, an unknown model id)
raises UserError with a single line naming the file or field. The CLI prints it
as ``speedbench: error: <message>`` and exits with status 2; no traceback.
Programming errors stay ordinary exceptions so they keep their traceback.
"""


class UserError(Exception):
    """A mistake in the user's input; the message is one line and names the culprit."""

    def __init__(self, message: str):
        # Keep it to one line whatever the caller passed in.
        super().__init__(" ".join(str(message).split()))


def one_line(exc, limit: int = 300) -> str:
    """An exception's text on one line, cut at `limit` characters (for a failed row's reason)."""
    return " ".join(str(exc).split())[:limit]
