"""Shared test helpers."""

from __future__ import annotations

import os

import pytest


def require_kernels():
    """The compiled kernels (:mod:`bhgrow._kernels`), or skip the test where the C
    extension was not built (no compiler at install time). CI sets
    ``BHGROW_REQUIRE_KERNELS=1`` (``.ci/run``), which turns the skip into a failure."""
    from bhgrow import _kernels

    k = _kernels.kernels()
    if k is None:
        msg = ("bhgrow's compiled kernels are not built (or BHGROW_KERNELS=0): the array "
               "code ran instead")
        if os.environ.get("BHGROW_REQUIRE_KERNELS", "") == "1":
            pytest.fail(msg)
        pytest.skip(msg)
    return k
