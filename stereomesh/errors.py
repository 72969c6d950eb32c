"""Exceptions shared by the core and the front doors."""


class InputError(ValueError):
    """Bad input from the user: a missing or unreadable file, mismatched sizes.

    Front doors turn it into exit code 2 and print its message, which names the
    file concerned and what to do about it.
    """


class Cancelled(Exception):  # noqa: N818  (a state, not an error)
    """Raised by a progress callback to stop a run the user cancelled.

    The core lets it through (wrapped in ``StageFailed``, as its ``__cause__``);
    front doors report it as cancelled, not as a failure.
    """
