"""Error types that the command line turns into exit statuses.

Nothing below the CLI prints or exits: modules raise these, and `shardtrain.cli` maps
them to one line on stderr and an exit status.
"""
from contextlib import contextmanager

EXIT_BAD_INPUT = 2     # the user's files or options are wrong
EXIT_RUN_FAILED = 3    # a run broke: a worker died, a frame was corrupt, a deadline passed
EXIT_INTERRUPTED = 4   # Ctrl-C or SIGTERM; the latest checkpoint is intact

_MARK = "\0"     # around a parameter named inside a message (no path or repr holds NUL)
_NAME_OF = None  # how str() names a parameter while the command line runs (`naming`)


@contextmanager
def naming(name_of):
    """While the block runs, `str()` of an error names each parameter `name_of(param)` (the
    command line's option: `cli.main` runs every command inside it, so a message passed on
    as text, such as MPI rank 0's stop message, keeps the option's name too)."""
    global _NAME_OF
    before, _NAME_OF = _NAME_OF, name_of
    try:
        yield
    finally:
        _NAME_OF = before


def option(param: str) -> str:
    """Name another parameter inside a message: "give " + option("overwrite") + " to ...".
    `str()` of the error shows the Python name ("give overwrite"), the command line its
    option ("give --overwrite"; `shardtrain.cli.flags`, `naming`)."""
    return f"{_MARK}{param}{_MARK}"


def reword(text: str, name_of=None) -> str:
    """`text` with each `option(...)` mention put as `name_of(param)` (default: the name)."""
    parts = text.split(_MARK)
    return "".join(name_of(part) if i % 2 and name_of is not None else part
                   for i, part in enumerate(parts))


class _Worded(Exception):
    """An error whose message may name parameters (`option`)."""

    def __str__(self) -> str:
        return reword(super().__str__(), _NAME_OF)

    def worded(self, name_of=None) -> str:
        """The message with `name_of(param)` for each parameter it names."""
        return reword(super().__str__(), name_of)


class InputError(_Worded):
    """Bad input. The message is one line naming the file and line, or the option."""


class RunError(_Worded):
    """A run that started but could not finish (worker death, corrupt frame, timeout)."""


class Interrupted(_Worded):
    """The run was stopped by a signal; the message says how to resume (naming the
    parameters to give as `option`s)."""


class ParameterError(InputError):
    """Bad value of a named parameter of a library function.

    `param` is the Python name (`method`, `link_gbps`, `features`; `also`: more parameters
    the message names together); the message is `PREFIX PARAM[, ALSO...][ VALUE]SEP TEXT`
    (`prefix` empty and `sep` ": " unless given), and `str()` names the Python parameter:
    "method 'x': unknown; expected one of ...". The command line words it with the option
    instead (`shardtrain.cli.flags.cli_message`, and `str()` itself inside `naming`, which
    `cli.main` holds), so a library never spells a command-line flag and the CLI's
    messages keep their words.
    """

    def __init__(self, param: str, text: str, *, value: object = None, sep: str = ": ",
                 prefix: str = "", also: tuple[str, ...] = ()) -> None:
        self.param, self.text, self.sep, self.prefix = param, text, sep, prefix
        self.params = (param, *also)
        self.value = None if value is None else str(value)
        names = ", ".join(option(p) for p in self.params)
        head = names if self.value is None else f"{names} {self.value}"
        super().__init__(f"{prefix}{head}{sep}{text}")

    def __reduce__(self):   # the default would call __init__ with the message alone
        return (_parameter_error, (self.param, self.text, self.value, self.sep, self.prefix,
                                   self.params[1:]))


def marked(exc: BaseException) -> str:
    """The message of `exc` with its parameter mentions still marked, to pass on as text
    (a worker process's error, sent to the coordinator): an error made from it names them
    as its own reader does."""
    return Exception.__str__(exc) if isinstance(exc, _Worded) else str(exc)


def _parameter_error(param, text, value, sep, prefix, also) -> ParameterError:
    return ParameterError(param, text, value=value, sep=sep, prefix=prefix, also=also)


def name_parameter(exc: InputError, param: str, value: object) -> InputError:
    """`exc`, raised below a function with the head `f"{param} {value}"` (a file reader's or
    folder probe's `where`), as a ParameterError about `param`; any other `exc` unchanged."""
    head, text = f"{param} {value}", Exception.__str__(exc)   # mentions kept (`option`)
    if isinstance(exc, ParameterError) or not text.startswith(head):
        return exc
    return ParameterError(param, text[len(head):], value=value, sep="")
