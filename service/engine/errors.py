"""Domain errors raised by the engine; only the web layer turns them into HTTP."""


class EngineError(Exception):
    """Base class of every error the engine raises."""


class ItemError(EngineError):
    """One or more items are well-formed but impossible under the basis.

    ``errors`` maps a path inside the batch, such as ``"3.lives.0.age"``, to messages.
    """

    def __init__(self, errors: dict[str, list[str]]):
        self.errors = errors
        first = next(iter(errors.items()))
        super().__init__(f"{first[0]}: {first[1][0]}")


class FieldError(EngineError, ValueError):
    """One input field is impossible under the basis; ``field`` names it for the caller."""

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(message)


class TableError(EngineError):
    """A mortality table is not usable (bad rates, wrong shape, unknown law)."""


class WorkLimitError(EngineError):
    """A batch would need more evaluation points than the caller allows."""

    def __init__(self, work: int, limit: int):
        self.work = work
        self.limit = limit
        super().__init__(f"{work} evaluation points needed, at most {limit} allowed")


class DeadlineError(EngineError):
    """The valuation was still running at its deadline and was abandoned."""
