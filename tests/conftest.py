"""Shared test helpers."""

import os

import pytest


def skip_or_fail(reason: str) -> None:
    """Skip a test whose external dependency (Meep, Chromium) is missing — except in CI
    (CI=true), whose setup must install everything: there a missing dependency fails."""
    if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
        pytest.fail(f"{reason} (CI must install it: see Makefile and scripts/)")
    pytest.skip(reason)
