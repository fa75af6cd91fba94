-- query_node_kinds: the kinds under which a node id exists in a version (`graphkit similar` picks its query node
-- with it and refuses an id that exists under several kinds without --id-kind).
-- grain: one row per node kind holding the id.
-- inputs: view embeddings.
-- params: $node_id (text; compared as text), $id_kind (text or null: only this kind).
with final as (
    select node_kind
    from embeddings
    where node_id::varchar = $node_id and ($id_kind is null or node_kind = $id_kind)
    order by node_kind
)

select * from final
