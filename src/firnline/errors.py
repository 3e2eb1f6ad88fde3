"""The one exception type that means "the user's input is wrong" (a ValueError)."""


class InputError(ValueError):
    """Bad input or config.

    The message is one plain sentence that names the file, key or row at fault
    and says what to do about it. The command line prints it and exits with
    status 2, without a traceback.
    """
