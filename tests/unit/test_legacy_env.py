"""The former settings prefix (ECHOWATCH_*) is read for one release, with a warning; the new one wins."""

from __future__ import annotations

import warnings

import pytest

from service.settings import Settings


def test_old_prefix_is_read_with_a_warning_naming_the_new_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("KILTER_RETENTION_DAYS", raising=False)
    monkeypatch.setenv("ECHOWATCH_RETENTION_DAYS", "12")
    with pytest.warns(FutureWarning, match="ECHOWATCH_RETENTION_DAYS is deprecated: set KILTER_RETENTION_DAYS"):
        settings = Settings()
    assert settings.retention_days == 12.0


def test_new_prefix_wins_over_the_old(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("ECHOWATCH_RETENTION_DAYS", "12")
    monkeypatch.setenv("KILTER_RETENTION_DAYS", "30")
    with pytest.warns(FutureWarning):
        settings = Settings()
    assert settings.retention_days == 30.0


def test_no_warning_without_old_variables(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in [k for k in __import__("os").environ if k.upper().startswith("ECHOWATCH_")]:
        monkeypatch.delenv(name)
    monkeypatch.setenv("KILTER_RETENTION_DAYS", "30")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert Settings().retention_days == 30.0
