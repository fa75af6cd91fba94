-- edge_index: the adjacency in dense indices, ready to become CSR arrays.
-- grain: one row per stored adjacency entry (src_idx, dst_idx); an undirected edge appears in both directions.
-- inputs: tables edges and nodes (see edges.sql, nodes.sql).
-- params: $directed (boolean).
with pairs as (
    select s.node_idx as src_idx, d.node_idx as dst_idx, e.weight
    from edges as e
    join nodes as s on e.src_kind = s.node_kind and e.src = s.node_id
    join nodes as d on e.dst_kind = d.node_kind and e.dst = d.node_id
),

both_directions as (
    select src_idx, dst_idx, weight from pairs
    union all
    select dst_idx as src_idx, src_idx as dst_idx, weight from pairs where not $directed
),

final as (
    select src_idx, dst_idx, weight::float as weight
    from both_directions
    order by src_idx, dst_idx
)

select * from final
