"""The error a user can fix: the command line prints its one-line message and exits non-zero."""

__all__ = ["QtallyError"]


class QtallyError(Exception):
    """Bad input, named in one line with the fix."""
