"""The generator's one error type."""


class DatagenError(ValueError):
    """Bad generator options or output folder; the message says which and what to do."""
