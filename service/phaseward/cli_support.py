"""What every ``phaseward`` command shares: errors that end a command with one line naming the
problem and what to do, exit code 2 for usage errors and 1 for failures, settings read from the
environment without a traceback, and input files read the same way by every command."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from phaseward.settings import Settings

USAGE = 2  # the command line or the settings are wrong: nothing was attempted
FAILED = 1  # the command was understood and did not succeed


class CommandError(Exception):
    """Ends a command: ``message`` names the problem and what to do about it."""

    def __init__(self, message: str, *, code: int = FAILED) -> None:
        super().__init__(message)
        self.code = code


def usage(message: str) -> CommandError:
    return CommandError(message, code=USAGE)


def load_settings(**overrides: Any) -> Settings:
    """The settings from ``PHASEWARD_*`` variables and ``overrides``; a refused value becomes
    one line naming the variable."""
    try:
        return Settings(**overrides)
    except ValidationError as err:
        first = err.errors()[0]
        where = ".".join(str(part) for part in first["loc"])
        name = f"PHASEWARD_{where.upper()}: " if where else ""
        message = str(first["msg"]).removeprefix("Value error, ")
        raise usage(f"{name}{message}: fix that setting (variable or option)") from None


def read_input(path: str, what: str) -> bytes:
    """The bytes of an input file the user named, or a usage error saying what is wrong."""
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise usage(f"{what} {path} does not exist: check the path") from None
    except IsADirectoryError:
        raise usage(f"{what} {path} is a directory: name a file") from None
    except OSError as err:
        raise usage(f"cannot read {what} {path}: {err.strerror}") from None


def read_json(path: str, what: str) -> Any:
    """An input file of JSON, or a usage error naming the line that is wrong."""
    try:
        return json.loads(read_input(path, what))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        where = f" (line {err.lineno})" if isinstance(err, json.JSONDecodeError) else ""
        raise usage(f"{what} {path} is not valid JSON{where}: see examples/README.md") from None
