"""The error a user can fix: the command line prints its one-line message and exits non-zero."""

__all__ = ["QtallyError", "first_line"]


class QtallyError(Exception):
    """Bad input, named in one line with the fix."""


def first_line(exc: BaseException) -> str:
    """The first line of an exception's message (its type name if it has none), for one-line errors.

    >>> first_line(KeyError("5x5")), first_line(ValueError("bad\\nmore")), first_line(AssertionError())
    ("KeyError: '5x5'", 'bad', 'AssertionError')
    """
    if isinstance(exc, KeyError) and exc.args:  # str(KeyError) is only the quoted key, which reads as nothing
        return f"KeyError: {exc}"[:300]
    text = str(exc).strip().splitlines()
    return (text[0] if text else type(exc).__name__)[:300]
