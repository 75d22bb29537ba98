"""Errors that the command line reports as one line on stderr with exit code 2."""


class InputError(ValueError):
    """Bad input from the user: the message says what is wrong and what to do."""
