"""Nightly audit of arterial blood gas records: ingest, check, derive, audit."""

__version__ = "0.1.0"
