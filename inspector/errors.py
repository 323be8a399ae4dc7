"""Exceptions that carry a user-facing, one-line message.

The command line turns :class:`UsageError` into exit code 2 and :class:`FrameError`
into a recorded skip; everything else is a failure (exit code 1).
"""


class InspectorError(Exception):
    """Base class for errors this tool raises on purpose."""


class UsageError(InspectorError):
    """A mistake in the command line, the config file or the user's data layout (exit 2)."""


class FrameError(InspectorError):
    """A frame that cannot be scored; the message is the skip reason written to skipped.csv."""
