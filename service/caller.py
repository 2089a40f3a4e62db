"""Who is calling: the key's owner, its role and the assets it may use.

Below the API on purpose: the ingest path, the dashboard and the shared actions
(service/actions.py) decide on a Caller without importing the HTTP layer.

Roles: machine posts readings and scores; maintenance < operator < admin for people;
admin may also do machine actions. Machine keys may be limited to named assets.
"""

from __future__ import annotations

from dataclasses import dataclass

PEOPLE_RANK = {"maintenance": 1, "operator": 2, "admin": 3}


@dataclass(frozen=True)
class Caller:
    key_id: int
    name: str
    role: str
    assets: frozenset[str] | None  # None = every asset

    def has_role(self, needed: str) -> bool:
        if self.role == "admin":
            return True
        if needed == "machine" or self.role == "machine":
            return self.role == needed
        return PEOPLE_RANK.get(self.role, 0) >= PEOPLE_RANK[needed]

    def may_use_asset(self, asset_id: str) -> bool:
        return self.assets is None or asset_id in self.assets
