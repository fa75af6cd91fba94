-- similar: the nodes most similar (cosine) to one node, for `graphkit similar` (graphkit.store.similar_nodes).
-- grain: one row per neighbour, most similar first (ties by node_id, then node_kind).
-- inputs: view embeddings and macro nearest_neighbours (sql/macros.sql), the one nearest-neighbour query.
-- params: $node_id (text), $id_kind (text: the query node's kind), $kind (text or null: only neighbours of this
--         kind), $k (integer).
with final as (
    select node_id, node_kind, similarity
    from nearest_neighbours($node_id, $k, kind := $kind, id_kind := $id_kind)
)

select * from final
