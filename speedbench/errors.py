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


def storage_error(exc: OSError, path, hint: str = "") -> UserError:
    """A UserError for an OSError met while writing `path`: a full disk, a read-only place,
    a name the file system refuses. One line, naming the path; `hint` says what is kept."""
    import errno

    code = getattr(exc, "errno", None)
    if code in (errno.ENOSPC, errno.EDQUOT):
        text = f"no space left on device at {path}"
    elif code == errno.EROFS:
        text = f"{path}: cannot write (read-only file system)"
    elif code in (errno.EACCES, errno.EPERM):
        text = f"{path}: cannot write (permission denied)"
    elif code == errno.ENAMETOOLONG:
        text = f"{path}: file name too long"
    else:
        text = f"{path}: cannot write ({getattr(exc, 'strerror', None) or exc})"
    return UserError(f"{text}; {hint}" if hint else text)


def one_line(exc, limit: int = 300) -> str:
    """An exception's text on one line, cut at `limit` characters (for a failed row's reason)."""
    return " ".join(str(exc).split())[:limit]
