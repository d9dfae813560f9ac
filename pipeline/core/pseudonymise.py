"""Re-keying of incoming person tokens with HMAC-SHA256 before anything is stored.

The warehouse never holds the token a lab sent: ``person_key`` is the HMAC of the token under a
secret key, so the same token gives the same key in every run and every lab that shares the
linkage domain, and nobody without the key can go back from a key to a token.

The key comes from ``KIDNEYSURV_PSEUDONYM_KEY`` or from the file named by
``KIDNEYSURV_PSEUDONYM_KEY_FILE``, which must be readable by its owner only (mode 0600 or 0400):
a key file that its group or other users could read is refused. The key is never logged, printed
or stored; only whether it was the public demo key is (``demo_key`` in every run's outputs).
"""

from __future__ import annotations

import hashlib
import hmac
import os
import stat
from dataclasses import dataclass
from pathlib import Path

import polars as pl

KEY_ENV = "KIDNEYSURV_PSEUDONYM_KEY"
KEY_FILE_ENV = "KIDNEYSURV_PSEUDONYM_KEY_FILE"

#: The demo key is public on purpose: it is written in this file and in the README, and every
#: output made with it says so. Never use it for real data.
DEMO_KEY = "kidneysurv-demo-key-NOT-SECRET"

#: Linkage domain of tokens shared by every lab of the region.
SHARED_DOMAIN = "shared"


class KeyMissing(Exception):
    """No pseudonymisation key was given for a non-demo run (or it cannot be used)."""


class KeyFileUnsafe(KeyMissing):
    """The key file cannot be read, is empty, or others than its owner may read it."""


class KeyWeak(KeyMissing):
    """The key is too short or trivially guessable."""


class KeyMismatch(KeyMissing):
    """The key is not the one the warehouse was built with (its check value differs)."""


#: Shortest key accepted: 24 characters (a key made by ``secrets.token_urlsafe(32)`` has 43).
#: Common practice: an HMAC key should carry at least as many bits as the hash's security level
#: (RFC 2104, section 3: "less than L bytes is strongly discouraged"); 24 random URL-safe
#: characters carry 144 bits.
MIN_KEY_LENGTH = 24
#: Fewest distinct characters in a key: refuses "aaaa...", "abababab..." and the like.
MIN_KEY_DISTINCT = 8
HOW_TO_MAKE_A_KEY = (
    'make one with: python -c "import secrets; print(secrets.token_urlsafe(32))" and keep it in an '
    f"owner-only file named by {KEY_FILE_ENV}"
)

#: The label whose HMAC under the key is the warehouse's key check value. Fixed forever: a new
#: label would make every warehouse refuse its own key.
KEY_CHECK_LABEL = b"kidneysurv key check value v1"


@dataclass(frozen=True)
class PseudonymKey:
    secret: bytes
    is_demo: bool

    def __repr__(self) -> str:  # never print the secret
        return f"PseudonymKey(is_demo={self.is_demo})"


def read_key_file(path: Path) -> bytes:
    """The key in ``path`` (one line; the line end is not part of it), if only its owner may read it."""
    try:
        info = path.stat()
    except OSError as exc:
        raise KeyFileUnsafe(
            f"{KEY_FILE_ENV}={path}: the key file cannot be used ({exc.strerror})"
        ) from None
    if not stat.S_ISREG(info.st_mode):
        raise KeyFileUnsafe(f"{KEY_FILE_ENV}={path}: not a regular file")
    mode = stat.S_IMODE(info.st_mode)
    if mode & 0o077:
        raise KeyFileUnsafe(
            f"{KEY_FILE_ENV}={path}: the key file has mode {mode:04o}, so users other than its owner "
            f"may read or change it; make it owner-only (chmod 600 {path}) and keep it outside the "
            "inbox and the output folder"
        )
    if hasattr(os, "geteuid") and info.st_uid != os.geteuid():
        raise KeyFileUnsafe(
            f"{KEY_FILE_ENV}={path}: the key file belongs to another user (uid {info.st_uid})"
        )
    try:
        secret = path.read_bytes().rstrip(b"\r\n")
    except OSError as exc:
        raise KeyFileUnsafe(
            f"{KEY_FILE_ENV}={path}: the key file cannot be read ({exc.strerror})"
        ) from None
    if not secret.strip():
        raise KeyFileUnsafe(f"{KEY_FILE_ENV}={path}: the key file is empty")
    return secret


def check_key_strength(secret: bytes, where: str) -> None:
    """Refuse a key that is short, only whitespace, has whitespace at either end (a copy
    mistake), or is trivially weak (one character repeated, too few distinct characters).
    """
    text = secret.decode("utf-8", errors="replace")
    problem = None
    if not text.strip():
        problem = "is only whitespace"
    elif text != text.strip():
        problem = "begins or ends with whitespace (a copy mistake?)"
    elif len(text) < MIN_KEY_LENGTH:
        problem = f"is {len(text)} characters long, fewer than the {MIN_KEY_LENGTH} required"
    elif len(set(text)) == 1:
        problem = "is one character repeated"
    elif len(set(text)) < MIN_KEY_DISTINCT:
        problem = (
            f"uses only {len(set(text))} distinct characters (at least {MIN_KEY_DISTINCT} required)"
        )
    if problem:
        raise KeyWeak(f"{where}: the pseudonymisation key {problem}; {HOW_TO_MAKE_A_KEY}")


def key_check_value(key: PseudonymKey) -> str:
    """A non-reversible check value of the key: HMAC-SHA256 of a fixed label under the key, in
    hex. It tells whether a later run uses the same key; it gives nothing of the key itself (nor
    of any person key, whose messages never equal the label).
    """
    return hmac.new(key.secret, KEY_CHECK_LABEL, hashlib.sha256).hexdigest()


def verify_warehouse_key(con, key: PseudonymKey) -> None:
    """Compare the key with the check value the warehouse recorded at its first run (table
    ``key_check``); record it when there is none. A different key raises :class:`KeyMismatch`
    with what to do: one month keyed otherwise would split every person from their history.
    """
    value = key_check_value(key)
    stored = con.execute("select check_value, demo_key, recorded_at from key_check").fetchall()
    if not stored:
        con.execute("insert into key_check values (?, ?, current_timestamp)", [value, key.is_demo])
        return
    check, was_demo, recorded_at = stored[0]
    if hmac.compare_digest(check, value):
        return
    when = f"{recorded_at:%Y-%m-%d}" if recorded_at else "its first run"
    if was_demo and not key.is_demo:
        raise KeyMismatch(
            "this warehouse was built with the public DEMO key; a real key's data never goes into "
            "it: give the run a new output folder (--out) for real data"
        )
    if key.is_demo and not was_demo:
        raise KeyMismatch(
            "this warehouse holds data keyed with the region's own key; the public demo key cannot "
            "be used with it: run the demo into another output folder (--out)"
        )
    raise KeyMismatch(
        f"the pseudonymisation key is not the one this warehouse was built with (check value "
        f"recorded {when}); a month keyed otherwise would split every person from their history. "
        f"Set {KEY_ENV} (or {KEY_FILE_ENV}) to the region's key. If the key was changed on purpose, "
        "start a new output folder (--out) and load the history again with 'kidneysurv backfill'"
    )


def resolve_key(demo: bool) -> PseudonymKey:
    """The key from ``KIDNEYSURV_PSEUDONYM_KEY``, else from the owner-only file named by
    ``KIDNEYSURV_PSEUDONYM_KEY_FILE``, else the public demo key for a demo run; a non-demo run
    without a key raises :class:`KeyMissing`, a weak key :class:`KeyWeak`.
    """
    value = os.environ.get(KEY_ENV, "")
    if value:
        check_key_strength(value.encode("utf-8"), KEY_ENV)
        return PseudonymKey(secret=value.encode("utf-8"), is_demo=value == DEMO_KEY)
    key_file = os.environ.get(KEY_FILE_ENV, "")
    if key_file:
        secret = read_key_file(Path(key_file))
        check_key_strength(secret, f"{KEY_FILE_ENV}={key_file}")
        return PseudonymKey(secret=secret, is_demo=secret == DEMO_KEY.encode("utf-8"))
    if demo:
        return PseudonymKey(secret=DEMO_KEY.encode("utf-8"), is_demo=True)
    raise KeyMissing(
        f"set {KEY_ENV} to the region's pseudonymisation key, or {KEY_FILE_ENV} to an owner-only "
        "file holding it, before a run (the demo uses a public demo key; real data must not)"
    )


def person_key(key: PseudonymKey, domain: str, token: str) -> str:
    """HMAC-SHA256 of ``domain`` and ``token``, as 32 hex characters (128 bits)."""
    message = f"{domain}\x1f{token}".encode()
    return hmac.new(key.secret, message, hashlib.sha256).hexdigest()[:32]


def _hash_pairs(key: PseudonymKey, pairs: pl.DataFrame) -> pl.DataFrame:
    """``pairs`` (linkage_domain, person_token) with their ``person_key``: :func:`person_key` of
    each, the HMAC's key schedule done once (``hmac.copy``, the same digest).
    """
    base = hmac.new(key.secret, digestmod=hashlib.sha256)
    keys = []
    for domain, token in zip(pairs["linkage_domain"], pairs["person_token"], strict=False):
        mac = base.copy()
        mac.update(f"{domain}\x1f{token}".encode())
        keys.append(mac.hexdigest()[:32])
    return pairs.with_columns(pl.Series("person_key", keys, dtype=pl.String))


class PersonKeyCache:
    """The person keys computed so far in one run, so that each (linkage domain, token) is
    hashed once per run however many files carry it. Held in memory only, for the run: it is
    never written, logged or printed (its repr gives the count only).
    """

    def __init__(self, key: PseudonymKey) -> None:
        self.key = key
        self._known = pl.DataFrame(schema={"linkage_domain": pl.String, "person_token": pl.String,
                                           "person_key": pl.String})  # fmt: skip

    def __len__(self) -> int:
        return self._known.height

    def __repr__(self) -> str:
        return f"PersonKeyCache({len(self)} keys)"

    def keys_for(self, pairs: pl.DataFrame) -> pl.DataFrame:
        """Distinct ``pairs`` with their keys, hashing only those not seen before in the run."""
        on = ["linkage_domain", "person_token"]
        new = _hash_pairs(self.key, pairs.join(self._known, on=on, how="anti"))
        seen = pairs.join(self._known, on=on, how="inner")
        if new.height:
            self._known = pl.concat([self._known, new], rechunk=False)
        return pl.concat([seen, new])


def add_person_keys(
    frame: pl.DataFrame, key: PseudonymKey, cache: PersonKeyCache | None = None
) -> pl.DataFrame:
    """Replace ``person_token`` (with ``linkage_domain``) by ``person_key``.

    Only the distinct tokens are hashed, then joined back, so the cost follows the number of
    persons, not of rows; with a ``cache`` (one per run) a token already keyed in the run is
    not hashed again. A blank token gives a null key (rejected later as ``missing_person``).
    """
    if cache is not None and cache.key != key:
        raise ValueError("the key cache was made for another key")
    pairs = frame.select("linkage_domain", "person_token").unique().drop_nulls()
    keys = cache.keys_for(pairs) if cache is not None else _hash_pairs(key, pairs)
    keyed = frame.join(
        keys, on=["linkage_domain", "person_token"], how="left", maintain_order="left"
    ).drop("person_token", "linkage_domain")
    if "specimen_id" not in keyed.columns:
        return keyed
    # a specimen id that held the person's token has it masked by the reader; the mask is made
    # the person's own (the start of their key), so that two persons' specimens "<token>-1" stay
    # two specimens, not one specimen id under two persons (a specimen_conflict rejecting both)
    own = pl.format(f"{SPECIMEN_MASK[:-1]}:{{}}]", pl.col("person_key").str.slice(0, 12)).fill_null(
        ""
    )
    return keyed.with_columns(
        pl.when(
            pl.col("person_key").is_not_null()
            & pl.col("specimen_id").str.contains(SPECIMEN_MASK, literal=True)
        )
        .then(pl.col("specimen_id").str.replace_all(SPECIMEN_MASK, own, literal=True))
        .otherwise(pl.col("specimen_id"))
        .alias("specimen_id")
    )


#: The readers' mask of a person token (pipeline/stages/ingest/rows.py), as it can stand in a
#: specimen id.
SPECIMEN_MASK = "[person]"


def person_range(chunk: int, chunks: int) -> tuple[str, str]:
    """The person keys of one chunk: ``lower <= person_key < upper``. A person key is the hex of
    an HMAC-SHA256 (pipeline/core/pseudonymise.py), spread uniformly, so equal ranges of its first
    eight hex digits hold about equal numbers of persons; comparing text is about four times
    cheaper per row than hashing it again (measured at 10M results).
    """
    lower = f"{(chunk << 32) // chunks:08x}"
    upper = (
        f"{((chunk + 1) << 32) // chunks:08x}" if chunk + 1 < chunks else "g"
    )  # after every hex digit
    return lower, upper
