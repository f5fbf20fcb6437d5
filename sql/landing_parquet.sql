-- Records of one Parquet landing file (variable landing_path): one row per record, key __row
-- (its 1-based row in the file), so quarantine names the row a user can find. A view: the
-- file is already typed, so it is read where it is checked instead of being copied first.
with records as (
    select file_row_number + 1 as __row, * exclude (file_row_number)
    from read_parquet(getvariable('landing_path'), file_row_number = true)
)
select * from records
