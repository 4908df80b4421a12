"""Domain exceptions of the harness: each carries a one-line message for the user."""

from __future__ import annotations

__all__ = ["CaseError", "InputError"]


class InputError(ValueError):
    """Bad input from the user (case file or command line): reported in one line, exit status 2."""


class CaseError(InputError):
    """A case file that cannot be used: the message names the file, the key and what was expected."""

    def __init__(self, path: str, key: str, expected: str) -> None:
        self.path, self.key, self.expected = path, key, expected
        super().__init__(f"{path}: `{key}`: {expected}")
