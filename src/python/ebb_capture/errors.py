"""The one error the recorder raises: what went wrong, where, and what to do."""


class CaptureError(RuntimeError):
    """A step could not be recorded faithfully; nothing was written.

    The message names the ATen op (when one is at fault), the user's own
    ``file:line`` and what to do about it, on one line.
    """
