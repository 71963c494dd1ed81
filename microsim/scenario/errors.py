"""The one exception for bad input: it names the field path and says what would be valid."""


class ScenarioError(Exception):
    """Bad user input. `path` is the field path (e.g. `transitions.a->b.probability`)."""

    def __init__(self, path: str, message: str):
        self.path = path
        self.message = message
        super().__init__(f"{path}: {message}" if path else message)
