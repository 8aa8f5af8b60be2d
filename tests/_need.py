"""What a test needs. Missing, it skips the test on a workstation and FAILS it under CI (``CI`` set),
so a CI run that lost a dependency, a browser or a compiled path cannot pass by skipping."""

from __future__ import annotations

import importlib
import os

import pytest


def under_ci() -> bool:
    return bool(os.environ.get("CI"))


def need(module: str):
    """``import module``, or skip (fail under CI) when it cannot be imported."""
    if under_ci():
        try:
            return importlib.import_module(module)
        except ImportError as exc:
            pytest.fail(f"{module} cannot be imported under CI: {exc}")
    return pytest.importorskip(module)


def need_that(ok: bool, reason: str, *, module_level: bool = False) -> None:
    """Skip (fail under CI) unless ``ok``; ``reason`` says what is missing."""
    if ok:
        return
    if under_ci():
        pytest.fail(f"{reason} (needed under CI)", pytrace=False)
    pytest.skip(reason, allow_module_level=module_level)
