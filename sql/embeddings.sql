-- embeddings: a kept version's vectors in the catalog, as downstream jobs read them (view `embeddings` for the
-- current version, `embeddings_vNNNNNN` for each kept complete one).
-- grain: one row per node of the version.
-- inputs: the Parquet file of that version.
-- params: $view (identifier), $path (absolute path of the Parquet file), $dim (integer). A view's body is stored
--         as text, so these are written in by graphkit.sql.inline, quoted, when the catalog is rebuilt.
-- Parquet keeps no fixed list size, so the cast restores FLOAT[dim] for the array_* functions.
create or replace view $view as
with final as (
    select node_id, node_kind, provisional, vector::float[$dim] as vector
    from read_parquet($path)
)
select * from final
