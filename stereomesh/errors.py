"""Exceptions shared by the core and the front doors."""


class InputError(ValueError):
    """Bad input from the user: a missing or unreadable file, mismatched sizes.

    Front doors turn it into exit code 2 and print its message, which names the
    file concerned and what to do about it.
    """
