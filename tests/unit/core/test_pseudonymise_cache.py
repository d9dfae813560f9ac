"""The run's person-key cache: every (linkage domain, token) is hashed once per run, the keys are
those of :func:`pipeline.core.pseudonymise.person_key` (HMAC-SHA256, RFC 2104, checked against
Python's ``hmac`` module in stages/ingest/test_landing_layouts.py), and no token is ever shown by the cache.

Outside reference: Python's ``hmac`` module (``hmac.new(...).hexdigest()``), and its docs for
``HMAC.copy()`` (a copy of the keyed state gives the digest of the key and the later input).
"""

from __future__ import annotations

import hashlib
import hmac

import polars as pl
import pytest

from pipeline.core import pseudonymise
from pipeline.core.pseudonymise import PersonKeyCache, PseudonymKey, add_person_keys

KEY = PseudonymKey(secret=b"westerfold-test-secret", is_demo=False)


def frame(pairs: list[tuple[str | None, str | None]]) -> pl.DataFrame:
    return pl.DataFrame({"line_no": list(range(len(pairs))), "linkage_domain": [d for d, _ in pairs],
                         "person_token": [t for _, t in pairs]},
                        schema={"line_no": pl.Int64, "linkage_domain": pl.String, "person_token": pl.String})  # fmt: skip


def test_keys_are_hmac_sha256_of_domain_and_token_with_or_without_the_cache():
    rows = [
        ("shared", "WF-a1"),
        ("shared", "WF-b2"),
        ("lab_x", "WF-a1"),
        ("shared", None),
        ("shared", "WF-a1"),
    ]
    cache = PersonKeyCache(KEY)
    keyed = add_person_keys(frame(rows), KEY, cache)
    assert keyed.equals(add_person_keys(frame(rows), KEY))
    expected = [hmac.new(KEY.secret, f"{d}\x1f{t}".encode(), hashlib.sha256).hexdigest()[:32] if t else None
                for d, t in rows]  # fmt: skip
    assert keyed["person_key"].to_list() == expected
    assert keyed.columns == ["line_no", "person_key"]


def test_each_token_is_hashed_once_per_run(monkeypatch):
    hashed: list[int] = []
    real = pseudonymise._hash_pairs

    def counting(key, pairs):  # the real hashing, counted
        hashed.append(pairs.height)
        return real(key, pairs)

    monkeypatch.setattr(pseudonymise, "_hash_pairs", counting)
    cache = PersonKeyCache(KEY)
    first = add_person_keys(
        frame([("shared", "WF-a1"), ("shared", "WF-b2"), ("shared", "WF-a1")]), KEY, cache
    )
    second = add_person_keys(
        frame([("shared", "WF-b2"), ("shared", "WF-c3"), ("lab_x", "WF-b2")]), KEY, cache
    )
    assert hashed == [2, 2]  # a1, b2; then c3 and (lab_x, b2): b2 in the shared domain was known
    assert len(cache) == 4
    assert first["person_key"][1] == second["person_key"][0]  # the same token, the same key


def test_the_cache_never_shows_a_token_or_the_key():
    cache = PersonKeyCache(KEY)
    add_person_keys(frame([("shared", "WF-secret-token")]), KEY, cache)
    assert "WF-secret-token" not in repr(cache) and "westerfold-test-secret" not in repr(cache)
    assert repr(cache) == "PersonKeyCache(1 keys)"


def test_a_cache_is_for_one_key():
    with pytest.raises(ValueError, match="another key"):
        add_person_keys(
            frame([("shared", "WF-a1")]), PseudonymKey(b"other", False), PersonKeyCache(KEY)
        )
