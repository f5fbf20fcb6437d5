-- One CSV landing file parsed as text: one row per record that parses, in file order (rowid
-- is its position among parsed records). The dialect is fixed because sniffing guesses wrong
-- on damaged files; records that do not parse are kept in landing_rejects with their text.
with parsed as (
    select *
    from read_csv(
        $path, columns = $cols, header = $header, delim = ',', quote = '"', escape = '"', auto_detect = false,
        null_padding = true, store_rejects = true, rejects_table = 'landing_rejects',
        rejects_scan = 'landing_reject_scans'
    )
)
select * from parsed
