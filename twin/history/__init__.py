"""Files of tag values: one-window value files (``twin reconcile``) and historian exports (``twin backfill``)."""

from twin.history.readers import (
    DEFAULT_GOOD_QUALITY,
    FileReport,
    HistoryError,
    HistoryReader,
    Samples,
    read_samples,
)
from twin.history.timestamps import KINDS as TIMESTAMP_KINDS
from twin.history.timestamps import TimestampError
from twin.history.values import ValuesFile, read_values_file

__all__ = [
    "DEFAULT_GOOD_QUALITY",
    "TIMESTAMP_KINDS",
    "FileReport",
    "HistoryError",
    "HistoryReader",
    "Samples",
    "TimestampError",
    "ValuesFile",
    "read_samples",
    "read_values_file",
]
