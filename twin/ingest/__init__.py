"""Ingest: MQTT payloads → SI samples → bounded per-tag ring buffers → window statistics."""

from twin.ingest.decode import (
    REJECT_REASONS,
    DecodeOutcome,
    PayloadFormat,
    Rejection,
    Sample,
    TagBinding,
    TopicMap,
    parse_timestamp,
)
from twin.ingest.pipeline import Ingestor, LogRateLimiter, RejectCounter
from twin.ingest.store import TagStore, WindowStats, stale_tags

__all__ = [
    "REJECT_REASONS",
    "DecodeOutcome",
    "Ingestor",
    "LogRateLimiter",
    "PayloadFormat",
    "RejectCounter",
    "Rejection",
    "Sample",
    "TagBinding",
    "TagStore",
    "TopicMap",
    "WindowStats",
    "parse_timestamp",
    "stale_tags",
]
