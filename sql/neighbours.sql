-- neighbours: every node's nearest neighbours in a kept version, as published with `[store] neighbours = K`
-- (view `neighbours` for the current version, `neighbours_vNNNNNN` for each kept version that has the table).
-- grain: one row per (node, neighbour): node_id, node_kind, neighbour_id, neighbour_kind, rank (1 = most
--        similar; ties by neighbour id, then kind), similarity (cosine, from the approximate index of
--        graphkit.neighbours); a node is never its own neighbour.
-- inputs: the version's neighbours.parquet (written by graphkit.neighbours.write_neighbours before the version
--         folder is renamed into place).
-- params: $view (identifier), $path (absolute path of the file), written in by graphkit.sql.inline, quoted, when
--         the catalog is rebuilt (a view's body is stored as text).
create or replace view $view as
with final as (
    select node_id, node_kind, neighbour_id, neighbour_kind, rank, similarity
    from read_parquet($path)
)
select * from final
