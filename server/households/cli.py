"""CLI commands of the households domain."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction, storage: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add this domain's commands: ``sub`` is the top level, ``storage`` the `storage` group."""
