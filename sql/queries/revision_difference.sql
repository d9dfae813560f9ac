-- Rows of a published table in one release and not in the other (as many times as they differ):
-- 0 when the period's new rows equal the stashed rows of the release before. The inputs
-- new_rows and old_rows (the same columns, in the same order) are put in front by sql_over.
with differing as (
    (select * from new_rows except all select * from old_rows)
    union all
    (select * from old_rows except all select * from new_rows)
)
select count(*) from differing
