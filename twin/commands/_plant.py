"""Reading the plant file for a command: the config, or one line on stderr and an exit code."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from twin.config import PlantConfig


def load_plant(command: str, path: str) -> PlantConfig | int:
    """The validated plant file at ``path``, or the exit code after its error lines.

    Exit codes: 1 when the file breaks the schema (one line per problem, naming the
    file and key), 2 when it cannot be read (missing, a directory, no permission).
    """
    from twin.config import ConfigError, load_config

    try:
        return load_config(path)
    except ConfigError as exc:
        for line in exc.problems:
            print(line, file=sys.stderr)
        return 1
    except FileNotFoundError:
        print(f"{command}: cannot read {path}: no such file", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"{command}: cannot read {path}: {exc.strerror or exc}", file=sys.stderr)
        return 2
