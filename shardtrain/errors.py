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


class ParameterError(InputError):
    """Bad value of a named parameter of a library function.

    `param` is the Python name (`method`, `link_gbps`, `features`; `also`: more parameters
    the message names together); the message is `PREFIX PARAM[, ALSO...][ VALUE]SEP TEXT`
    (`prefix` empty and `sep` ": " unless given), and `str()` names the Python parameter:
    "method 'x': unknown; expected one of ...". The command line words it with the option
    instead (`shardtrain.cli.flags`), so a library never spells a command-line flag and the
    CLI's messages keep their words.
    """

    def __init__(self, param: str, text: str, *, value: object = None, sep: str = ": ",
                 prefix: str = "", also: tuple[str, ...] = ()) -> None:
        self.param, self.text, self.sep, self.prefix = param, text, sep, prefix
        self.params = (param, *also)
        self.value = None if value is None else str(value)
        super().__init__(self.worded())

    def worded(self, name_of=None) -> str:
        """The message with `name_of(param)` for each parameter (the option, on the CLI)."""
        names = ", ".join(p if name_of is None else name_of(p) for p in self.params)
        head = names if self.value is None else f"{names} {self.value}"
        return f"{self.prefix}{head}{self.sep}{self.text}"

    def __reduce__(self):   # the default would call __init__ with the message alone
        return (_parameter_error, (self.param, self.text, self.value, self.sep, self.prefix,
                                   self.params[1:]))


def _parameter_error(param, text, value, sep, prefix, also) -> ParameterError:
    return ParameterError(param, text, value=value, sep=sep, prefix=prefix, also=also)


def name_parameter(exc: InputError, param: str, value: object) -> InputError:
    """`exc`, raised below a function with the head `f"{param} {value}"` (a file reader's or
    folder probe's `where`), as a ParameterError about `param`; any other `exc` unchanged."""
    head, text = f"{param} {value}", str(exc)
    if isinstance(exc, ParameterError) or not text.startswith(head):
        return exc
    return ParameterError(param, text[len(head):], value=value, sep="")
