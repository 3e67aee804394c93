"""The one error the engine shows a user."""


class TraceError(ValueError):
    """Bad input, explained in one line: which file, which line, what was expected.

    The message is meant for the engineer who uploaded the file, so it never
    carries a traceback or Python jargon, e.g.
    ``scan.csv line 21: 'abc' is not a number in column Level (dBµV)``.
    """

    def __init__(self, message: str, *, name: str | None = None, line: int | None = None):
        prefix = ""
        if name and line is not None:
            prefix = f"{name} line {line}: "
        elif name:
            prefix = f"{name}: "
        super().__init__(prefix + message)
        self.name = name
        self.line = line
        self.detail = message
