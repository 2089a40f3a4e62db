"""A database URL the service cannot run on is refused by name, not with a driver's traceback."""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from service.settings import Settings, settings_error_text


def test_an_unsupported_scheme_is_named_with_what_is_accepted() -> None:
    with pytest.raises(ValidationError) as e:
        Settings(database_url="mysql://user@db.example/kilter")
    text = settings_error_text(e.value)
    assert text.startswith("KILTER_DATABASE_URL: database URL scheme 'mysql' is not supported")
    assert "sqlite:///" in text and "postgresql+psycopg://" in text


def test_supported_urls_pass_and_a_bare_postgresql_url_gets_the_installed_driver() -> None:
    assert Settings(database_url="sqlite:///var/x.db").database_url == "sqlite:///var/x.db"
    assert Settings(database_url="postgresql+psycopg://u@h/db").database_url == "postgresql+psycopg://u@h/db"
    assert Settings(database_url="postgresql://u@h/db").database_url == "postgresql+psycopg://u@h/db"
    with pytest.raises(ValidationError, match="is not a database URL"):
        Settings(database_url="var/kilter.db")
