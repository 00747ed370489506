"""The one exception type the command line turns into a clear line and exit code 2."""


class UserError(Exception):
    """Bad input from the user (shape, prefix, store URL, run id, job file, ...).

    The message is one sentence that says what is wrong and, where it helps,
    what to type instead.
    """
