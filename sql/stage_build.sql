-- One row per stage that leaves tables in the warehouse (ingest, episodes, learn): its newest
-- build. Key: stage. A later stage compares the settings recorded here with its own and the
-- build ids it was made from with the current ones, so it never runs on inputs that were
-- built with other settings or have been rebuilt since.
create table if not exists stage_build (
    stage varchar primary key,
    build_id varchar not null,
    run_id varchar not null,
    built_at timestamptz not null,
    settings json not null,
    upstream json not null
);
