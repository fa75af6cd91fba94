-- nodes: the dense node dictionary.
-- grain: one row per distinct node id seen in edges; node_idx is 0..n_nodes-1 in id order (deterministic).
-- inputs: table edges(src, dst, weight, n_rows).
-- params: none.
with ids as (
    select src as node_id from edges
    union
    select dst as node_id from edges
),

final as (
    select
        (row_number() over (order by node_id) - 1)::integer as node_idx,
        node_id
    from ids
)

select * from final
