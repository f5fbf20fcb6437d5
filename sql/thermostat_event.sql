-- Checked thermostat events of one landing file: one row per landing row, key source_row.
-- Several events may share an instant (a mode change and a setpoint change), so rows
-- are kept in file order; the hourly grid takes the last one of each hour.
with source as (
    select * from landing
),
typed as (
    select
        l.source_row,
        nullif(trim(l.premise_id), '') as premise_id,
        l.changed_at as changed_text,
        p.timezone,
        utc_instant(l.changed_at, p.timezone) as changed_at_utc,
        lower(trim(l.mode)) as mode,
        try_cast(nullif(trim(l.cool_setpoint_c), '') as double) as cool_setpoint_c,
        try_cast(nullif(trim(l.heat_setpoint_c), '') as double) as heat_setpoint_c,
        nullif(trim(l.cool_setpoint_c), '') is not null as cool_given,
        nullif(trim(l.heat_setpoint_c), '') is not null as heat_given,
        case lower(trim(l.occupied))
            when '1' then true when 'true' then true when '0' then false when 'false' then false
        end as occupied,
        nullif(trim(l.occupied), '') is not null as occupied_given,
        try_cast(nullif(trim(l.indoor_c), '') as double) as indoor_c,
        nullif(trim(l.indoor_c), '') is not null as indoor_given,
        p.premise_id is not null as premise_known
    from source l
    left join premise p on p.premise_id = trim(l.premise_id)
),
checked as (
    select
        premise_id, changed_at_utc, mode, cool_setpoint_c, heat_setpoint_c, occupied, indoor_c,
        source_row,
        case
            when premise_id is null then 'missing_key'
            when not premise_known then 'unknown_premise'
            when changed_text is null or trim(changed_text) = '' then 'missing_timestamp'
            when changed_at_utc is null then 'bad_timestamp'
            when local_time_missing(changed_text, timezone) then 'nonexistent_local_time'
            when local_time_ambiguous(changed_text, timezone) then 'ambiguous_local_time'
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
