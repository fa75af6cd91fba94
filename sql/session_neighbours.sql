-- session_neighbours: the views `neighbours` and `neighbours_vNNNNNN` of a read-only connection
-- (graphkit.connect), over a version's neighbours.parquet registered through Arrow (DuckDB's own file system is
-- switched off on that connection); temporary, so they shadow the catalog's views of the same names.
-- grain: one row per (node, neighbour), as sql/neighbours.sql.
-- inputs: relation $source (the registered file).
-- params: $view, $source (identifiers), written in by graphkit.sql.inline, quoted.
create or replace temp view $view as
with final as (
    select node_id, node_kind, neighbour_id, neighbour_kind, rank, similarity
    from $source
)
select * from final
