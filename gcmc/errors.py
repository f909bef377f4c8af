"""Error types shared by the package. An InputError is a user's mistake: the CLI prints it
on one line and exits with code 2."""


class InputError(ValueError):
    """Bad user input: a config field, a CLI option or a file. The message names it."""
