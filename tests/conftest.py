"""Shared fixtures; helpers live in _support.py."""

from __future__ import annotations

import pytest
from _support import write_raster


@pytest.fixture
def raster_writer(tmp_path):
    counter = {"n": 0}

    def _write(array, **kw):
        counter["n"] += 1
        return write_raster(tmp_path / f"r{counter['n']}.tif", array, **kw)

    return _write
