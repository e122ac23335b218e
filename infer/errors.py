"""Errors that reach the user as one line.

`UserError` is for anything the user can fix (a config key, a dataset field, a chain file, a command-line
value). The command-line entry point prints ``infer: <message>`` and exits with `EXIT_USAGE` without a
traceback unless ``--debug`` is given. Every message names the file, key or value and what is wrong.
"""

#: Exit codes of the ``infer`` command (documented in the README).
EXIT_OK = 0          # finished: stopping rule met or requested length reached
EXIT_INTERNAL = 1    # a bug: unexpected exception (traceback shown with --debug)
EXIT_USAGE = 2       # bad input: config, dataset, chain file or command line
EXIT_PAUSED = 75     # stopped early by a signal or the wall-time budget; checkpoint written; resume later
                     # (75 is EX_TEMPFAIL of sysexits.h: "try again later")
EXIT_PIPE = 141      # standard output closed by the reader (128 + SIGPIPE, the shell's convention)


class UserError(Exception):
    """A problem with the user's input; ``str(err)`` is the whole one-line message."""


class ChainFileError(UserError):
    """A chain file that is missing, damaged, locked or inconsistent."""
