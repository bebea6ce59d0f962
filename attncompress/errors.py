"""The one error type a user can cause."""


class CompressError(Exception):
    """A problem with the user's input: a file, a tensor, an option.

    The message is one line that names the file (or option), the tensor where
    there is one, what was expected and, when it is obvious, the fix. The CLI
    prints it as it is and exits with status 1.
    """
