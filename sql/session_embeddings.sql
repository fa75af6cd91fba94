-- session_embeddings: the views `embeddings` and `embeddings_vNNNNNN` of a read-only connection
-- (graphkit.connect), over each version's native DuckDB copy attached read-only (or, without one, its Parquet
-- file registered through Arrow); temporary, so they shadow the catalog's Parquet-backed views of the same names.
-- grain: one row per node of the version.
-- inputs: relation $source (the attached copy's table, or the registered Parquet file).
-- params: $view, $source (identifiers), $dim (integer); written in by graphkit.sql.inline, quoted, as a view's
--         body cannot refer to bound parameters.
create or replace temp view $view as
with final as (
    select node_id, node_kind, provisional, vector::float[$dim] as vector
    from $source
)
select * from final
