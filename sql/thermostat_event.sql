-- Checked thermostat events of one landing file: one row per landing row, key source_row.
-- Several events may share an instant (a mode change and a setpoint change), so rows
-- are kept in file order; the hourly grid takes the last one of each hour.
with source as (
    select * from landing
),
-- Text is trimmed once and the offset test made once per row (the local_time_* and
-- utc_instant macros in schema.sql state the same rules for one value at a time).
trimmed as (
    select
        source_row,
        nullif(trim(premise_id), '') as premise_id,
        trim(changed_at) as changed_text,
        lower(trim(mode)) as mode,
        nullif(trim(cool_setpoint_c), '') as cool_text,
        nullif(trim(heat_setpoint_c), '') as heat_text,
        nullif(lower(trim(occupied)), '') as occupied_text,
        nullif(trim(indoor_c), '') as indoor_text
    from source
),
parsed as (
    select
        l.*,
        p.timezone,
        p.premise_id is not null as premise_known,
        coalesce(regexp_matches(l.changed_text, '(Z|[+-][0-9]{2}(:?[0-9]{2})?)$'), false) as has_offset
    from trimmed l
    left join premise p on p.premise_id = l.premise_id
),
typed as (
    select
        source_row,
        premise_id,
        changed_text,
        timezone,
        has_offset,
        case when not has_offset then try_cast(changed_text as timestamp) end as wall_clock,
        case
            when has_offset then try_cast(changed_text as timestamptz)
            else timezone(timezone, try_cast(changed_text as timestamp))
        end as changed_at_utc,
        mode,
        try_cast(cool_text as double) as cool_setpoint_c,
        try_cast(heat_text as double) as heat_setpoint_c,
        cool_text is not null as cool_given,
        heat_text is not null as heat_given,
        case occupied_text
            when '1' then true when 'true' then true when '0' then false when 'false' then false
        end as occupied,
        occupied_text is not null as occupied_given,
        try_cast(indoor_text as double) as indoor_c,
        indoor_text is not null as indoor_given,
        premise_known
    from parsed
),
checked as (
    select
        premise_id, changed_at_utc, mode, cool_setpoint_c, heat_setpoint_c, occupied, indoor_c,
        source_row,
        case
            when premise_id is null then 'missing_key'
            when not premise_known then 'unknown_premise'
            when changed_text is null or changed_text = '' then 'missing_timestamp'
            when changed_at_utc is null then 'bad_timestamp'
            when not has_offset and timezone(timezone, changed_at_utc) <> wall_clock then 'nonexistent_local_time'
            when not has_offset
                and (timezone(timezone, changed_at_utc - interval 1 hour) = wall_clock
                    or timezone(timezone, changed_at_utc + interval 1 hour) = wall_clock)
                then 'ambiguous_local_time'
            when mode is null or mode not in ('cool', 'heat', 'off') then 'bad_code'
            when (cool_given and cool_setpoint_c is null) or (heat_given and heat_setpoint_c is null)
                or (indoor_given and indoor_c is null) then 'bad_number'
            when (occupied_given and occupied is null) then 'bad_code'
            when cool_setpoint_c not between $device_low and $device_high
                or heat_setpoint_c not between $device_low and $device_high then 'setpoint_out_of_range'
            when indoor_c not between -10 and 50 then 'temperature_out_of_range'
        end as reason
    from typed
)
select * from checked
