-- versions: one row per refresh that reached the publish step, complete or failed.
-- grain: one row per version number.
-- inputs: written by graphkit.store at publish time.
-- params: none.
create table if not exists versions (
    version integer primary key,
    created_at timestamp not null,
    status varchar not null,          -- 'complete', 'failed' (refused, e.g. by a quality gate) or 'expired'
    is_current boolean not null,
    pinned boolean not null default false,  -- retention never expires a pinned version
    path varchar,                     -- the version's Parquet file, relative to the store
    n_nodes bigint,
    dim integer,
    objective varchar,
    params json,                      -- the full resolved config
    input_fingerprint json,           -- path, size and footer hash of each input file
    counts json,                      -- rows read, dropped by reason, merged, nodes, edges, walks, tokens
    timings json,                     -- seconds per stage
    metrics json,
    package_version varchar,
    message varchar,
    run_id varchar                    -- the run that wrote the row: a retry of that run recognises it
)
