-- version_embeddings: table `embeddings` of a version's native DuckDB copy (versions/NNNNNN/embeddings.duckdb),
-- the same rows as its Parquet file, which graphkit.connect attaches read-only for fast SQL.
-- grain: one row per node of the version.
-- inputs: relation version_rows (the version's Arrow table, registered by graphkit.store when it publishes).
-- params: $dim (integer), written in by graphkit.sql.inline: a type is never a bound parameter.
create table embeddings as
with final as (
    select node_id, node_kind, provisional, vector::float[$dim] as vector
    from version_rows
)
select * from final
