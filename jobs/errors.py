"""Errors that the command line reports as one line on stderr with exit code 2."""


class InputError(ValueError):
    """Bad input from the user: the message says what is wrong and what to do."""


class Stopped(Exception):
    """A command stopped by a signal after saying what was kept (printed as is, with its exit code)."""

    def __init__(self, message: str, exit_code: int):
        super().__init__(message)
        self.exit_code = exit_code
