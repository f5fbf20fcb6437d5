-- Records of one Parquet landing file: one row per record, key __row (its 1-based row in
-- the file), so quarantine names the row a user can find.
with records as (
    select file_row_number + 1 as __row, * exclude (file_row_number)
    from read_parquet($path, file_row_number = true)
)
select * from records
