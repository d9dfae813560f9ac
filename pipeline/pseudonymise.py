"""Re-keying of incoming person tokens with HMAC-SHA256 before anything is stored.

The warehouse never holds the token a lab sent: ``person_key`` is the HMAC of the token under a
secret key, so the same token gives the same key in every run and every lab that shares the
linkage domain, and nobody without the key can go back from a key to a token.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from dataclasses import dataclass

import polars as pl

KEY_ENV = "KIDNEYSURV_PSEUDONYM_KEY"

#: The demo key is public on purpose: it is written in this file and in the README, and every
#: output made with it says so. Never use it for real data.
DEMO_KEY = "kidneysurv-demo-key-NOT-SECRET"

#: Linkage domain of tokens shared by every lab of the region.
SHARED_DOMAIN = "shared"


class KeyMissing(Exception):
    """No pseudonymisation key was given for a non-demo run."""


@dataclass(frozen=True)
class PseudonymKey:
    secret: bytes
    is_demo: bool

    def __repr__(self) -> str:  # never print the secret
        return f"PseudonymKey(is_demo={self.is_demo})"


def resolve_key(demo: bool) -> PseudonymKey:
    """Return the key from ``KIDNEYSURV_PSEUDONYM_KEY``, or the demo key for a demo run."""
    value = os.environ.get(KEY_ENV, "")
    if value:
        return PseudonymKey(secret=value.encode("utf-8"), is_demo=value == DEMO_KEY)
    if demo:
        return PseudonymKey(secret=DEMO_KEY.encode("utf-8"), is_demo=True)
    raise KeyMissing(
        f"set {KEY_ENV} to the region's pseudonymisation key before a run "
        "(the demo uses a public demo key; real data must not)"
    )


def person_key(key: PseudonymKey, domain: str, token: str) -> str:
    """HMAC-SHA256 of ``domain`` and ``token``, as 32 hex characters (128 bits)."""
    message = f"{domain}\x1f{token}".encode()
    return hmac.new(key.secret, message, hashlib.sha256).hexdigest()[:32]


def add_person_keys(frame: pl.DataFrame, key: PseudonymKey) -> pl.DataFrame:
    """Replace ``person_token`` (with ``linkage_domain``) by ``person_key``.

    Only the distinct tokens are hashed, then joined back, so the cost follows the number of
    persons, not of rows. A blank token gives a null key (rejected later as ``missing_person``).
    """
    pairs = frame.select("linkage_domain", "person_token").unique().drop_nulls()
    keys = pairs.with_columns(
        pl.struct("linkage_domain", "person_token")
        .map_elements(
            lambda r: person_key(key, r["linkage_domain"], r["person_token"]),
            return_dtype=pl.String,
        )
        .alias("person_key")
    )
    return frame.join(keys, on=["linkage_domain", "person_token"], how="left", maintain_order="left").drop(
        "person_token", "linkage_domain"
    )
