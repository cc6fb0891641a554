"""Errors that name the file, the field, what was expected and what was found."""


class InputError(ValueError):
    """A recording or profile that cannot be used as it is."""

    def __init__(self, file, field, expected, got):
        self.file = str(file)
        self.field = str(field)
        self.expected = str(expected)
        self.got = str(got)
        super().__init__(f"{self.file}: {self.field}: expected {self.expected}, got {self.got}")


class ProfileError(InputError):
    """A sensor profile that does not parse or validate."""


class StoreLockedError(RuntimeError):
    """Another run holds the store's write lock."""
