"""Ingestion: read the spec's source, validate and clean it with a ledger and quarantine, split, fingerprint."""
