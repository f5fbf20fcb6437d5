-- Each physical line of one CSV landing file after its header, unparsed: one row per line
-- in file order (blank lines null), so quote damage can be found line by line. The NUL
-- delimiter and no quote character keep every line whole.
with text as (
    select line
    from read_csv(
        $path, columns = {'line': 'VARCHAR'}, header = true, delim = chr(0), quote = '', escape = '',
        auto_detect = false, strict_mode = false
    )
)
select * from text
