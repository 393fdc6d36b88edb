"""Reading the plant file for a command: the config, or one line on stderr and an exit code."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from twin.config import PlantConfig
    from twin.history import ValuesFile


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


def load_values(command: str, path: str, config: PlantConfig) -> ValuesFile | int:
    """One window of tag values from ``path``, or the exit code after one line on stderr.

    Unreadable entries are printed (one line each, file:line) and kept in
    ``ValuesFile.errors`` so the caller's exit status can say the file was not wholly read.
    Exit codes: 2 when the file is missing, 1 when it cannot be parsed at all.
    """
    from twin.history import read_values_file

    try:
        vf = read_values_file(path, config)
    except FileNotFoundError:
        print(f"{command}: {path}: no such file", file=sys.stderr)
        return 2
    except (ValueError, UnicodeDecodeError) as exc:
        print(f"{command}: {exc}", file=sys.stderr)
        return 1
    for e in vf.errors:
        print(e, file=sys.stderr)
    return vf
