"""Deprecation shim for the settings prefix of the project's former name.

The project was called echowatch before it became kilter. For one release, settings given
as `ECHOWATCH_<NAME>` environment variables are still read, with a `FutureWarning`
naming each one, wherever the `KILTER_<NAME>` variable is not set (the new name wins).
The old default database file `var/echowatch.db` is not picked up: a warning says to
rename it or to point `KILTER_DATABASE_URL` at it. Remove this module in 0.3.
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path
from typing import Any

from pydantic_settings import BaseSettings, EnvSettingsSource

OLD_PREFIX = "ECHOWATCH_"
OLD_DEFAULT_DB = Path("var/echowatch.db")


class LegacyPrefixSource(EnvSettingsSource):
    """Reads `ECHOWATCH_*` variables and warns once per variable it used."""

    def __init__(self, settings_cls: type[BaseSettings]) -> None:
        super().__init__(settings_cls, env_prefix=OLD_PREFIX, case_sensitive=False)

    def __call__(self) -> dict[str, Any]:
        values = super().__call__()
        for name in sorted(values):
            warnings.warn(
                f"{OLD_PREFIX}{name.upper()} is deprecated: set KILTER_{name.upper()} instead "
                "(the old prefix is read for one more release)",
                FutureWarning,
                stacklevel=2,
            )
        return values


def old_environment_names() -> list[str]:
    """The `ECHOWATCH_*` variables present in the environment (for messages)."""
    return sorted(k for k in os.environ if k.upper().startswith(OLD_PREFIX))


def warn_if_old_default_database(database_url: str) -> None:
    """Warn when the new default database is used while the old default file exists."""
    if database_url == "sqlite:///var/kilter.db" and OLD_DEFAULT_DB.exists() and not Path("var/kilter.db").exists():
        warnings.warn(
            f"found {OLD_DEFAULT_DB} (the former default database) but the default is now var/kilter.db: "
            "rename the file or set KILTER_DATABASE_URL=sqlite:///var/echowatch.db",
            FutureWarning,
            stacklevel=2,
        )
