-- embeddings: the current version's vectors, as downstream jobs read them.
-- grain: one row per node of the current version.
-- inputs: the Parquet file of that version (path and dimension filled in by graphkit.store when it publishes).
-- params: {kind} ("" or "temp "), {view}, {path} (absolute, quoted), {dim} (integer); DuckDB views cannot take bound parameters.
-- Parquet keeps no fixed list size, so the cast restores FLOAT[dim] for the array_* functions.
create or replace {kind}view {view} as
with final as (
    select node_id, node_kind, provisional, vector::float[{dim}] as vector
    from read_parquet({path})
)
select * from final
