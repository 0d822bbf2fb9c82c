"""The one exception type for errors a user can cause (configuration, input files)."""


class RaytraceError(Exception):
    """An error in user input: the message names the config key or the file at fault.

    The command-line interface prints it as a single line and exits with status 2.
    Programming errors are not wrapped in this type and keep their traceback.
    """

    def __init__(self, message: str):
        # One line, always: newlines from wrapped library messages are folded.
        super().__init__(" ".join(str(message).split()))
