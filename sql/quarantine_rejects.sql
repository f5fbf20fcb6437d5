-- Quarantines the CSV records the reader rejected: one row per line, key (source_file,
-- row_number), its text kept as the raw row.
insert into quarantine (source_file, row_number, reason, raw)
select $f, source_row, 'malformed_row', line
from landing_rejected
