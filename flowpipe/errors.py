"""Exceptions that the command line turns into one-line messages."""


class FlowpipeError(Exception):
    """A problem the user can fix: bad input, a bad option or a bad config.

    The command line prints ``flowpipe: error: <message>`` and exits with
    :attr:`exit_code` (2: usage error or unusable input).
    """

    exit_code = 2


class InputError(FlowpipeError):
    """An input file or variable that flowpipe cannot use as it is."""


class UsageError(FlowpipeError):
    """An option, argument or config value that is out of range or inconsistent."""


class FlowpipeWarning(UserWarning):
    """Something a result lacks or leaves out that the user should know about.

    The command line prints ``flowpipe: warning: <message>``.
    """
