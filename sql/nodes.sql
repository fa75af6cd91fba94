-- nodes: the dense node dictionary.
-- grain: one row per distinct (node_kind, node_id) seen in edges; node_idx is 0..n_nodes-1 in (kind, id) order,
--        so the same input gives the same indices.
-- inputs: table edges (see edges.sql).
-- params: none.
with ids as (
    select src_kind as node_kind, src as node_id from edges
    union
    select dst_kind as node_kind, dst as node_id from edges
),

final as (
    select
        (row_number() over (order by node_kind, node_id) - 1)::integer as node_idx,
        node_kind,
        node_id
    from ids
)

select * from final
