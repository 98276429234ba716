"""The one error type the command line shows to the user without a traceback."""


class UserError(Exception):
    """Bad input or a missing tool: the message says what, and what is allowed.

    The command line prints the message and exits with status 2.
    """
