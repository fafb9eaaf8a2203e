"""Errors the user can act on. Each message names the file, row, field or campaign."""

from __future__ import annotations


class ReplayError(Exception):
    """A clear, one-line problem with the user's input or request (exit code 2)."""


class InputError(ReplayError):
    """A bad input file, column, row or value."""


class UsageError(ReplayError):
    """A bad option: unknown rule or parameter, wrong unit or sign, empty window."""


class RunStoreError(ReplayError):
    """A run directory that cannot be read: missing manifest, other version, corrupt table."""
