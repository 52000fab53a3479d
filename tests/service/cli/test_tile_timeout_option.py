"""`demaudit run --tile-timeout`: parsed, checked, and falling back to the setting."""

from __future__ import annotations

import argparse

import pytest

from demaudit.service.cli.local import _tile_timeout_s, tile_timeout
from demaudit.service.settings import Settings


def test_seconds_and_zero_for_no_limit():
    assert tile_timeout("90") == 90.0 and tile_timeout("0") == 0.0
    for bad in ("-1", "soon", "nan", "inf"):
        with pytest.raises(argparse.ArgumentTypeError):
            tile_timeout(bad)


def test_the_flag_overrides_the_setting_and_zero_means_no_limit(monkeypatch):
    monkeypatch.setenv("DEMAUDIT_TILE_TIMEOUT_S", "600")
    settings = Settings()
    assert _tile_timeout_s(argparse.Namespace(tile_timeout=None), settings) == 600.0
    assert _tile_timeout_s(argparse.Namespace(tile_timeout=30.0), settings) == 30.0
    assert _tile_timeout_s(argparse.Namespace(tile_timeout=0.0), settings) is None


def test_the_setting_defaults_to_half_an_hour_and_zero_is_no_limit(monkeypatch):
    monkeypatch.delenv("DEMAUDIT_TILE_TIMEOUT_S", raising=False)
    assert Settings().tile_timeout_s == 1800.0
    monkeypatch.setenv("DEMAUDIT_TILE_TIMEOUT_S", "0")
    assert Settings().tile_timeout_s is None
    for bad in ("-5", "nan"):
        monkeypatch.setenv("DEMAUDIT_TILE_TIMEOUT_S", bad)
        with pytest.raises(ValueError, match="tile_timeout_s"):
            Settings()
