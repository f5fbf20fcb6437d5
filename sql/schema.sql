-- Warehouse schema: typed tables for each landing folder plus the bookkeeping that
-- proves nothing was lost (quarantine, ingest_log). Created once, kept across runs,
-- so that ingest can be incremental.
create table if not exists premise (
    premise_id varchar primary key,
    timezone varchar not null,
    weather_station_id varchar not null,
    rate_plan_id varchar not null,
    comfort_cool_c double not null,
    comfort_heat_c double not null,
    cohort varchar not null,
    floor_area_m2 double,
    source_row bigint,
    source_file varchar not null
);
-- meter_read and weather_obs are keyed (premise_id, interval_start_utc) and (station_id,
-- observed_at_utc). The key is enforced by their check files (a second row for a key is
-- counted or quarantined, never inserted) and tested, not by a primary-key index: keeping
-- that index up cost more than the checks themselves on a 3-million-row file.
create table if not exists meter_read (
    premise_id varchar not null,
    interval_start_utc timestamptz not null,
    interval_minutes integer not null,
    kwh double not null,
    quality varchar not null,
    source_row bigint,
    source_file varchar not null
);
create table if not exists weather_obs (
    station_id varchar not null,
    observed_at_utc timestamptz not null,
    dry_bulb_c double not null,
    source_row bigint,
    source_file varchar not null
);
create table if not exists thermostat_event (
    premise_id varchar not null,
    changed_at_utc timestamptz not null,
    mode varchar not null,
    cool_setpoint_c double,
    heat_setpoint_c double,
    occupied boolean,
    indoor_c double,
    source_row bigint not null,
    source_file varchar not null
);
create table if not exists tariff_rate (
    rate_plan_id varchar not null,
    month_from integer not null,
    month_to integer not null,
    day_type varchar not null,
    start_hour integer not null,
    end_hour integer not null,
    price_per_kwh double not null,
    source_row bigint,
    source_file varchar not null
);
-- row_number counts data records of the file (header and blank lines not counted); raw
-- is the record as JSON of its columns, or the text line when it could not be parsed.
-- record_key (table|key values) is set on conflicting duplicates so that a later file
-- with the same key is quarantined too instead of being silently chosen.
create table if not exists quarantine (
    source_file varchar not null,
    row_number bigint not null,
    reason varchar not null,
    raw varchar,
    record_key varchar
);
create table if not exists ingest_log (
    source_file varchar primary key,
    folder varchar not null,
    content_hash varchar not null,
    rows_read bigint not null,
    rows_loaded bigint not null,
    rows_quarantined bigint not null,
    rows_duplicate bigint not null,
    status varchar not null,
    message varchar,
    seconds double not null,
    ingested_at timestamptz not null,
    quarantined_by_reason varchar,
    missing_since timestamptz
);
-- Warehouses made before these columns existed gain them here.
alter table premise add column if not exists source_row bigint;
alter table meter_read add column if not exists source_row bigint;
alter table weather_obs add column if not exists source_row bigint;
alter table tariff_rate add column if not exists source_row bigint;
alter table quarantine add column if not exists record_key varchar;
alter table ingest_log add column if not exists quarantined_by_reason varchar;
alter table ingest_log add column if not exists missing_since timestamptz;
-- An instant in UTC from landing text: with an offset (or Z) it is absolute; without,
-- it is local wall-clock time in the premise's zone.
create or replace macro utc_instant(txt, tz) as
    case
        when regexp_matches(trim(txt), '(Z|[+-][0-9]{2}(:?[0-9]{2})?)$') then try_cast(trim(txt) as timestamptz)
        else timezone(tz, try_cast(trim(txt) as timestamp))
    end;
-- Wall-clock text without an offset that names no instant (spring-forward gap).
create or replace macro local_time_missing(txt, tz) as
    not regexp_matches(trim(txt), '(Z|[+-][0-9]{2}(:?[0-9]{2})?)$')
    and timezone(tz, timezone(tz, try_cast(trim(txt) as timestamp))) <> try_cast(trim(txt) as timestamp);
-- Wall-clock text without an offset that names two instants (fall-back hour).
create or replace macro local_time_ambiguous(txt, tz) as
    not regexp_matches(trim(txt), '(Z|[+-][0-9]{2}(:?[0-9]{2})?)$')
    and (
        timezone(tz, timezone(tz, try_cast(trim(txt) as timestamp)) - interval 1 hour) = try_cast(trim(txt) as timestamp)
        or timezone(tz, timezone(tz, try_cast(trim(txt) as timestamp)) + interval 1 hour) = try_cast(trim(txt) as timestamp)
    );
-- The UTC hour an instant falls in (date_trunc('hour', ts) in a UTC session), by integer
-- arithmetic on epoch microseconds: date_trunc on timestamptz goes through the calendar and
-- was most of the cost of the meter hours. The remainder is taken as a floor, so instants
-- before 1970 fall in their own hour too.
create or replace macro utc_hour(ts) as
    make_timestamptz(epoch_us(ts) - ((epoch_us(ts) % 3600000000) + 3600000000) % 3600000000);
-- Meter kWh and minutes read per premise and UTC hour. A read lies inside one UTC hour
-- unless its zone is offset by a part of an hour (e.g. a 60-minute read on the local
-- hour in a -03:30 zone); such a read is shared among the hours it overlaps in
-- proportion to the minutes in each, so kWh is conserved. hourly and coverage both
-- read hours from here, so their counts of short hours agree.
create or replace macro meter_hours() as table
    -- Not materialized: scanning the stored reads twice is cheaper than copying them.
    with reads as not materialized (
        select premise_id, interval_start_utc as starts, interval_minutes, kwh from meter_read
    ),
    -- Every read counted whole in the hour it starts in (all reads, in whole-hour zones) ...
    whole as (
        select premise_id, utc_hour(starts) as hour_utc, kwh, interval_minutes as minutes
        from reads
    ),
    -- ... then, for the few that run past that hour, each hour's share minus the whole read.
    straddling as (
        select *, utc_hour(starts) as first_hour
        from reads
        where epoch(starts)::bigint % 3600 + interval_minutes * 60 > 3600
    ),
    shares as (
        select *,
               (epoch(least(starts + to_minutes(interval_minutes), hour_utc + interval 1 hour))
                - epoch(greatest(starts, hour_utc)))::bigint // 60 as minutes_in_hour
        from (
            select *, unnest(generate_series(first_hour,
                                             starts + to_minutes(interval_minutes) - interval 1 microsecond,
                                             interval 1 hour)) as hour_utc
            from straddling
        )
    ),
    corrections as (
        select premise_id, hour_utc,
               kwh * minutes_in_hour / interval_minutes - if(hour_utc = first_hour, kwh, 0) as kwh,
               minutes_in_hour - if(hour_utc = first_hour, interval_minutes, 0) as minutes
        from shares
    )
    select premise_id, hour_utc, sum(kwh) as kwh, sum(minutes) as minutes_read
    from (select * from whole union all select * from corrections)
    group by all;
-- Each premise's number, its rank in premise-id order: episode ids are built from it, so
-- they are the same whether the episode stage runs in one shard or many.
create or replace view premise_order as
    select premise_id, row_number() over (order by premise_id) as premise_number from premise;
