"""Lifecycle: registry access, tracking, the audit history, gate checks, drift and version comparison."""
