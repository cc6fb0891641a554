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


# The CLI's exit codes, one table (README "Exit codes"; tests/test_exit_codes.py runs each case).
EXIT_CODES = {
    "ok": {"code": 0, "meaning": "done; every recording scored"},
    "input_error": {"code": 1, "meaning": "an inbox, profile, labels file or store that cannot be used "
                                          "(the message names the file, the field and what was expected)"},
    "usage": {"code": 2, "meaning": "the command line does not parse (unknown option, missing argument)"},
    "unscored": {"code": 3, "meaning": "done, but some recordings were left unscored (reasons printed and stored)"},
    "locked": {"code": 4, "meaning": "another run holds the store's write lock (--wait SECONDS waits for it)"},
    "no_server": {"code": 5, "meaning": "serve: no Prefect server configured (PREFECT_API_URL unset)"},
}
