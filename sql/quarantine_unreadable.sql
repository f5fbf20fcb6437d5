-- Quarantines an unreadable file line by line: one row per non-blank line, key
-- (source_file, row_number), so a refused file loses nothing.
insert into quarantine (source_file, row_number, reason, raw)
select $f, source_row, 'unreadable_file', line
from unreadable_lines
