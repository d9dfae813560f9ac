-- key_check: the non-reversible check value of the pseudonymisation key this warehouse was
-- built with (HMAC-SHA256 of a fixed label under the key; never the key). A run whose key gives
-- another value refuses to start (pipeline/core/pseudonymise.py, verify_warehouse_key).
create table if not exists key_check (
    check_value  varchar not null,
    demo_key     boolean not null,
    recorded_at  timestamp not null
);
