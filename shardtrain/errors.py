"""Error types that the command line turns into exit statuses.

Nothing below the CLI prints or exits: modules raise these, and `shardtrain.cli` maps
them to one line on stderr and an exit status.
"""

EXIT_BAD_INPUT = 2     # the user's files or options are wrong
EXIT_RUN_FAILED = 3    # a run broke: a worker died, a frame was corrupt, a deadline passed
EXIT_INTERRUPTED = 4   # Ctrl-C or SIGTERM; the latest checkpoint is intact


class InputError(Exception):
    """Bad input. The message is one line naming the file and line, or the option."""


class RunError(Exception):
    """A run that started but could not finish (worker death, corrupt frame, timeout)."""


class Interrupted(Exception):
    """The run was stopped by a signal; the message says how to resume."""
