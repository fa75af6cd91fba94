-- query_vector: the vector of one node, for `graphkit similar` when it answers from a version's neighbour index
-- (graphkit.store.similar_nodes, graphkit.neighbours.NeighbourIndex).
-- grain: one row (the node), or none.
-- inputs: view embeddings.
-- params: $node_id (text; compared as text), $id_kind (text: the node's kind).
with final as (
    select vector
    from embeddings
    where node_id::varchar = $node_id and node_kind = $id_kind
    limit 1
)

select * from final
